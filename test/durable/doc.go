// Package durable tests genvelope serve on NATS JetStream end to end:
// real nats-server processes on loopback (a single node and a 3-node
// cluster), genvelope processes killed with SIGKILL and restarted, two
// replicas on one stream, partitions split across processes, and the
// faults (NATS unreachable, lost, a foreign message in the stream).
package durable
