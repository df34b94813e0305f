package main

import (
	"context"
	"flag"
	"log/slog"
	"strings"
	"time"

	"github.com/genvelope/genvelope/service/durable"
)

// natsFlags are serve's flags of the durable, replicated mode.
type natsFlags struct {
	urls, creds, tlsCA, tlsCert, tlsKey, prefix, stream, serves *string
	partitions, replicas                                        *int
	maxAge, timeout, checkpoint, maxLag                         *time.Duration
	maxLagMsgs                                                  *uint64
}

func addNATSFlags(fs *flag.FlagSet) *natsFlags {
	return &natsFlags{
		urls:       fs.String("nats", "", "NATS servers `URL[,URL...]`: accepted samples and operator actions are written to a JetStream stream before they are acknowledged, and the state is built from it (see the README); \"\" keeps the in-process state"),
		creds:      fs.String("nats-creds", "", "NATS credentials `FILE`"),
		tlsCA:      fs.String("nats-tls-ca", "", "CA `FILE` to verify the NATS servers (turns TLS on)"),
		tlsCert:    fs.String("nats-tls-cert", "", "client certificate `FILE` for NATS"),
		tlsKey:     fs.String("nats-tls-key", "", "client key `FILE` for NATS"),
		prefix:     fs.String("nats-prefix", "genvelope", "subject prefix: <prefix>.telemetry.<partition>, <prefix>.ops"),
		stream:     fs.String("nats-stream", "", "JetStream stream name (default the prefix in capitals)"),
		serves:     fs.String("partitions", "", "partitions this replica serves, e.g. 0-3 or 0,2,4-5 (default all)"),
		partitions: fs.Int("nats-partition-count", durable.DefaultPartitions, "number of partitions the fleet is hashed into; the same on every replica"),
		replicas:   fs.Int("nats-replicas", 1, "stream replicas: 3 in a 3-node cluster"),
		maxAge:     fs.Duration("nats-max-age", 7*24*time.Hour, "how long the stream keeps messages"),
		checkpoint: fs.Duration("nats-checkpoint-interval", 5*time.Second, "how often the checkpoint (state and the stream sequence it includes) is written to --state; a restart replays the log from it"),
		timeout:    fs.Duration("nats-timeout", 5*time.Second, "longest wait for the stream to confirm a write and for this replica to apply it; past it the batch is answered UNAVAILABLE"),
		maxLag:     fs.Duration("nats-max-lag", 5*time.Second, "/readyz says not ready while this replica is further behind the log than this (the age of what it applies); ready again once within half of it and of --nats-max-lag-messages for 2 s"),
		maxLagMsgs: fs.Uint64("nats-max-lag-messages", 10000, "/readyz says not ready while more messages of the log than this wait to be applied here"),
	}
}

func (f *natsFlags) enabled() bool { return strings.TrimSpace(*f.urls) != "" }

// open connects to NATS; the checkpoint is kept in statePath.
func (f *natsFlags) open(statePath string, log *slog.Logger) (*durable.Log, error) {
	var urls []string
	for _, u := range strings.Split(*f.urls, ",") {
		if u = strings.TrimSpace(u); u != "" {
			urls = append(urls, u)
		}
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	return durable.Open(ctx, durable.Config{
		URLs: urls, CredsFile: *f.creds, TLSCA: *f.tlsCA, TLSCert: *f.tlsCert, TLSKey: *f.tlsKey,
		Prefix: *f.prefix, Stream: *f.stream, Partitions: *f.partitions, Serves: *f.serves, Replicas: *f.replicas,
		MaxAge: *f.maxAge, Timeout: *f.timeout, CheckpointPath: statePath, CheckpointInterval: *f.checkpoint,
		MaxLag: *f.maxLag, MaxLagMessages: *f.maxLagMsgs, Logger: log,
	})
}
