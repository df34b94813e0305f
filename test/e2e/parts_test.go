package e2e

import (
	"bytes"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"

	"github.com/genvelope/genvelope/test/testenv"
)

// The README's scrape configuration for a large fleet, run by a real
// Prometheus against the service (intervals shortened to a second): the
// job for the process and fleet-wide families and one target per shard
// are all up, each shard target is scraped with its own ?shard=I/N (a
// __param_ label), and Prometheus holds exactly the units those shards
// serve, the fleet-wide families only from the first job.
func TestPrometheusScrapesParts(t *testing.T) {
	if testing.Short() {
		t.Skip("end-to-end: skipped under -short")
	}
	promBin := testenv.NeedTool(t, "prometheus", install)
	root := testenv.ModuleRoot(t)
	readme, err := os.ReadFile(filepath.Join(root, "README.md"))
	if err != nil {
		t.Fatal(err)
	}
	section := readme[bytes.Index(readme, []byte("#### Metrics at scale")):]
	m := regexp.MustCompile("(?s)```yaml\n(scrape_configs:.*?)```").FindSubmatch(section)
	if m == nil {
		t.Fatal("no scrape_configs block under \"Metrics at scale\" in README.md")
	}
	dir := t.TempDir()
	bin := testenv.BuildGenvelope(t, root, dir)
	grpcAddr, httpAddr := testenv.Addr(testenv.FreePort(t)), testenv.Addr(testenv.FreePort(t))
	gv := testenv.StartProc(t, "genvelope", bin, "serve", "--fleet", filepath.Join(root, "deploy", "examples", "fleet.yaml"),
		"--grpc-listen", grpcAddr, "--http-listen", httpAddr, "--state", "", "--journal", "")
	gv.WaitHTTP(t, "http://"+httpAddr+"/readyz")

	// Two shards of the example's three units instead of ten: the two
	// targets the README lists then cover the whole fleet.
	cfg := strings.NewReplacer("genvelope.example:9464", httpAddr, "scrape_interval: 30s", "scrape_interval: 1s",
		"scrape_timeout: 25s", "scrape_timeout: 1s", `/10"`, `/2"`).Replace(string(m[1]))
	cfg = "global: {scrape_interval: 1s, scrape_timeout: 1s}\n" + cfg
	cfgPath := filepath.Join(dir, "prometheus.yml")
	if err := os.WriteFile(cfgPath, []byte(cfg), 0o644); err != nil {
		t.Fatal(err)
	}
	shards := regexp.MustCompile(`__param_shard: "(\d+/\d+)"`).FindAllStringSubmatch(cfg, -1)
	if len(shards) != 2 {
		t.Fatalf("the README's configuration has %d shard targets, want 2:\n%s", len(shards), cfg)
	}
	// What the shards named in the configuration serve, asked directly.
	want := 0
	for _, s := range shards {
		want += bytes.Count(get(t, gv, "http://"+httpAddr+"/metrics?shard="+s[1]), []byte("\ngenvelope_unit_info{"))
	}
	if want != 3 {
		t.Fatalf("shards %v serve %d units, want the example fleet's 3", shards, want)
	}
	promAddr := testenv.Addr(testenv.FreePort(t))
	prom := testenv.StartProc(t, "prometheus", promBin, "--config.file="+cfgPath,
		"--storage.tsdb.path="+filepath.Join(dir, "tsdb"), "--web.listen-address="+promAddr, "--log.level=warn")
	prom.WaitHTTP(t, "http://"+promAddr+"/-/ready")

	up := waitSeries(t, prom, promAddr, `up == 1`, 1+len(shards))
	t.Logf("targets up: %v", up)
	got := waitSeries(t, prom, promAddr, `count(genvelope_unit_info{job="genvelope-units"})`, 1)
	if int(got[0].value) != want {
		t.Errorf("Prometheus holds %g units from the shard targets; the shards serve %d", got[0].value, want)
	}
	if s := waitSeries(t, prom, promAddr, `count by (job) (genvelope_samples_total)`, 1); s[0].labels["job"] != "genvelope" {
		t.Errorf("fleet-wide series from %v, want the genvelope job alone", s)
	}
	if s := query(t, prom, promAddr, `genvelope_unit_info{job="genvelope"}`); len(s) != 0 {
		t.Errorf("the ?units=none job carries unit series: %v", s)
	}
}
