package report

import (
	"testing"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
)

// The table knows every limit the engine gives a margin, in the engine's
// order, under the engine's name, and its alarm watches that limit under
// the same name (the metrics' limit label and AlarmEvent.limit).
func TestLimitTable(t *testing.T) {
	all := limits.Limits()
	if len(Limits()) != len(all) {
		t.Fatalf("the table has %d limits, the engine %d", len(Limits()), len(all))
	}
	for i, l := range all {
		li := Limits()[i]
		if li.Limit != l || li.Name != l.String() {
			t.Errorf("entry %d: %v %q, want %v %q", i, li.Limit, li.Name, l, l.String())
		}
		if li.Title == "" || li.Basis == "" || li.Side == 0 {
			t.Errorf("%s: title %q, basis %q, side %v", li.Name, li.Title, li.Basis, li.Side)
		}
		if li.Alarm >= alarm.NumKinds || li.Alarm.String() != li.Name {
			t.Errorf("%s: alarm %v", li.Name, li.Alarm)
		}
		if LimitOfAlarm(li.Alarm) != l || LimitOf(l) != li {
			t.Errorf("%s: lookups disagree", li.Name)
		}
		if got, ok := LimitNamed(li.Name); !ok || got != li {
			t.Errorf("LimitNamed(%q) = %v, %v", li.Name, got, ok)
		}
		if AlarmTitle(li.Alarm) != li.Title {
			t.Errorf("%s: alarm title %q, limit title %q", li.Name, AlarmTitle(li.Alarm), li.Title)
		}
	}
	for _, k := range alarm.Kinds() {
		if AlarmTitle(k) == "" || AlarmTitle(k) == k.String() {
			t.Errorf("alarm %s has no title", k)
		}
	}
	if LimitOfAlarm(alarm.StaleTelemetry) != limits.NoLimit {
		t.Error("stale telemetry watches no limit")
	}
	if _, ok := LimitNamed("LIMIT_END_REGION"); ok {
		t.Error("the enum spelling is not a limit name")
	}
}
