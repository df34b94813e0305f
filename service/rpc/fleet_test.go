package rpc

import (
	"strings"
	"testing"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/report"
)

// Every limit of report's table has its enum value on the wire, and the
// enum's spelling is not taken as a name.
func TestLimitProto(t *testing.T) {
	seen := map[pb.Limit]string{}
	for _, li := range report.Limits() {
		name := li.Name
		got := limitProto(&name)
		if got == pb.Limit_LIMIT_UNSPECIFIED || got.String() != "LIMIT_"+strings.ToUpper(name) {
			t.Errorf("%s: %v", name, got)
		}
		if prev, dup := seen[got]; dup {
			t.Errorf("%s and %s share %v", prev, name, got)
		}
		seen[got] = name
	}
	for _, name := range []string{"LIMIT_END_REGION", "End_Region", "none", "zone"} {
		if got := limitProto(&name); got != pb.Limit_LIMIT_UNSPECIFIED {
			t.Errorf("%q: %v, want unspecified", name, got)
		}
	}
	if got := limitProto(nil); got != pb.Limit_LIMIT_UNSPECIFIED {
		t.Errorf("nil: %v", got)
	}
}
