package ingest

import (
	"math"
	"sync"
	"testing"
	"time"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
)

func exampleFleet(t testing.TB) *fleet.Fleet {
	t.Helper()
	fl, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	return fl
}

var t0 = time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)

func good(id string, at time.Time) Sample {
	return Sample{UnitID: id, Time: at, PMW: 200, QMvar: 50, VKV: 20}
}

func TestAcceptReasons(t *testing.T) {
	s := NewStore(exampleFleet(t), Options{})
	now := t0.Add(time.Hour)
	if r, _ := s.Accept(now, ptr(good("harrowmere-1", t0))); r != Accepted {
		t.Fatalf("first sample: %v", r)
	}
	for _, tc := range []struct {
		name string
		smp  Sample
		want Result
	}{
		{"unknown unit", good("nowhere-9", t0.Add(time.Second)), RejectUnknownUnit},
		{"no time", good("harrowmere-1", time.Time{}), RejectMissingTime},
		{"NaN", func() Sample { x := good("harrowmere-1", t0.Add(time.Second)); x.QMvar = math.NaN(); return x }(), RejectNotFinite},
		{"Inf field", func() Sample {
			x := good("harrowmere-1", t0.Add(time.Second))
			x.FieldA, x.HasFieldA = math.Inf(1), true
			return x
		}(), RejectNotFinite},
		{"zero voltage", func() Sample { x := good("harrowmere-1", t0.Add(time.Second)); x.VKV = 0; return x }(), RejectOutOfRange},
		{"absurd P", func() Sample { x := good("harrowmere-1", t0.Add(time.Second)); x.PMW = 1e6; return x }(), RejectImplausible},
		{"older", good("harrowmere-1", t0.Add(-time.Second)), RejectOutOfOrder},
		{"future", good("harrowmere-1", now.Add(6*time.Minute)), RejectFuture},
		{"invalid quality", func() Sample { x := good("harrowmere-1", t0.Add(time.Second)); x.Quality = QualityInvalid; return x }(), RejectInvalidQuality},
		{"duplicate", good("harrowmere-1", t0), Duplicate},
		{"next", good("harrowmere-1", t0.Add(time.Second)), Accepted},
	} {
		r, detail := s.Accept(now, ptr(tc.smp))
		if r != tc.want {
			t.Errorf("%s: got %v (%s), want %v", tc.name, r, detail, tc.want)
		}
		if r > Duplicate && detail == "" {
			t.Errorf("%s: a rejection needs a detail", tc.name)
		}
	}
	v := s.Unit("harrowmere-1").View()
	if v.Accepted != 2 || !v.Latest.Time.Equal(t0.Add(time.Second)) {
		t.Errorf("state after the table: %d accepted, latest %v", v.Accepted, v.Latest.Time)
	}
}

func ptr(s Sample) *Sample { return &s }

// goodLW is a good sample of larchwater-2 (13.8 kV).
func goodLW(at time.Time) Sample {
	return Sample{UnitID: "larchwater-2", Time: at, PMW: 100, QMvar: 20, VKV: 13.8}
}

// A resent stretch of samples is all duplicates, however far back it
// goes within the unit's memory; beyond it, out of order.
func TestResendIsDuplicate(t *testing.T) {
	s := NewStore(exampleFleet(t), Options{})
	now := t0.Add(time.Hour)
	for i := range 300 {
		if r, d := s.Accept(now, ptr(goodLW(t0.Add(time.Duration(i)*time.Second)))); r != Accepted {
			t.Fatalf("sample %d: %v %s", i, r, d)
		}
	}
	for i := 300 - ringSize; i < 300; i++ {
		if r, _ := s.Accept(now, ptr(goodLW(t0.Add(time.Duration(i)*time.Second)))); r != Duplicate {
			t.Fatalf("resent sample %d: %v, want duplicate", i, r)
		}
	}
	// Between two remembered timestamps: never accepted, so out of order.
	if r, _ := s.Accept(now, ptr(goodLW(t0.Add(299*time.Second-time.Millisecond)))); r != RejectOutOfOrder {
		t.Errorf("unseen older sample: %v, want out of order", r)
	}
	if r, _ := s.Accept(now, ptr(goodLW(t0))); r != RejectOutOfOrder {
		t.Errorf("sample older than the memory: %v, want out of order", r)
	}
}

// The field winding at 146 % of its rating for 30 s of sample time
// reaches the short-time limit (IEEE C50.13, from memory: 146 % for 30 s).
func TestThermalOnSampleTime(t *testing.T) {
	fl := exampleFleet(t)
	s := NewStore(fl, Options{})
	u := fl.Unit("harrowmere-1")
	ratedA := u.Model.RatedFieldCurrent() * u.Field.AirGapA
	now := t0.Add(time.Hour)
	// The first sample of a unit is suspect (nothing confirms it): its
	// current is held from the next one on. Send one a second before.
	for i := -1; i <= 30; i++ {
		smp := good("harrowmere-1", t0.Add(time.Duration(i)*time.Second))
		smp.FieldA, smp.HasFieldA = 1.46*ratedA, true
		smp.Coolant, smp.HasCoolant = 414, true
		s.Accept(now, &smp)
		used := s.Unit("harrowmere-1").View().Field.Used(33.75)
		if i == 29 && used >= 1 {
			t.Errorf("limit reached early, at %d s: H/K %.3f", i, used)
		}
		if i == 30 && (used < 1 || used > 1.02) {
			t.Errorf("at 30 s H/K = %.3f, want just over 1", used)
		}
	}
}

func TestReplaceKeepsState(t *testing.T) {
	fl := exampleFleet(t)
	s := NewStore(fl, Options{})
	s.Accept(t0, ptr(good("harrowmere-1", t0)))
	fl2 := exampleFleet(t)
	s.Replace(fl2)
	v := s.Unit("harrowmere-1").View()
	if !v.HasSample || v.Config != fl2.Unit("harrowmere-1") {
		t.Fatalf("after reload: has sample %v, config replaced %v", v.HasSample, v.Config == fl2.Unit("harrowmere-1"))
	}
	if r, _ := s.Accept(t0, ptr(good("harrowmere-1", t0))); r != Duplicate {
		t.Errorf("timestamps forgotten across reload: %v", r)
	}
}

// Many writers on many units and readers at once; run with -race.
func TestConcurrentIngest(t *testing.T) {
	fl := exampleFleet(t)
	s := NewStore(fl, Options{})
	var wg sync.WaitGroup
	for w := range 4 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			var tally Tally
			for i := range 500 {
				for _, id := range fl.IDs() {
					smp := good(id, t0.Add(time.Duration(i)*time.Second))
					smp.PMW = 50 + float64(w)
					smp.VKV = fl.Unit(id).Rating.KV
					r, _ := s.Accept(t0.Add(time.Hour), &smp)
					tally[r]++
				}
			}
			s.Commit(&tally)
		}()
	}
	wg.Add(1)
	go func() {
		defer wg.Done()
		for range 200 {
			for _, u := range s.Units() {
				_ = u.View()
			}
		}
	}()
	wg.Wait()
	c := s.Counts()
	n := uint64(len(fl.Units) * 500)
	if got := c[Accepted] + c[Duplicate] + c[RejectOutOfOrder]; got != 4*n {
		t.Errorf("results add up to %d, want %d", got, 4*n)
	}
	var perUnit uint64
	for _, u := range s.Units() {
		v := u.View()
		perUnit += v.Accepted
		if !v.Latest.Time.Equal(t0.Add(499 * time.Second)) {
			t.Errorf("%s: latest %v, want the last timestamp", v.Config.ID, v.Latest.Time)
		}
	}
	if perUnit != c[Accepted] || c[Accepted] > n {
		t.Errorf("units accepted %d, counters %d, at most %d", perUnit, c[Accepted], n)
	}
}

// The field margin trusts a good measurement that agrees with the model,
// and takes the larger of measurement and model when the sample is
// QUESTIONABLE or the two disagree beyond the mismatch alarm's warning
// (envelope.md, "Margins"): 1 - i_fd/i_fd_max by hand from the model's
// and the measured current.
func TestFieldMarginDoubtsQuestionableMeasurements(t *testing.T) {
	fl := exampleFleet(t)
	u := fl.Unit("harrowmere-1")
	ratedA := u.Model.RatedFieldCurrent() * u.Base.IFagA
	modelA := u.Base.FieldA(u.Model.FieldCurrent(u.Base.PowerPU(200), u.Base.PowerPU(50), 1))
	for i, tc := range []struct {
		name   string
		fieldA float64
		q      Quality
		wantA  float64
	}{
		{"good, agrees", 0.97 * modelA, QualityGood, 0.97 * modelA},
		{"good, reads 30 % low", 0.7 * modelA, QualityGood, modelA},
		{"questionable, reads 5 % low", 0.95 * modelA, QualityQuestionable, modelA},
		{"questionable, reads 5 % high", 1.05 * modelA, QualityQuestionable, 1.05 * modelA},
	} {
		s := NewStore(fl, Options{})
		smp := good("harrowmere-1", t0.Add(time.Duration(i)*time.Second))
		smp.FieldA, smp.HasFieldA, smp.Quality = tc.fieldA, true, tc.q
		if r, why := s.Accept(t0.Add(time.Hour), &smp); r != Accepted {
			t.Fatalf("%s: %v %s", tc.name, r, why)
		}
		m := s.Unit("harrowmere-1").View().Eval.Margins[limits.LimitField]
		if want := 1 - tc.wantA/ratedA; math.Abs(m.V-want) > 1e-9 {
			t.Errorf("%s: field margin %v, want %v", tc.name, m.V, want)
		}
	}
}

// The uel alarm watches the UEL margin: q - q_uel in pu, negative below
// the curve (coordination.md, "Live"); q_uel of the example's
// harrowmere-1 (circle centre 514 Mvar, radius 670 Mvar, 390 MVA, k = 2)
// at 300 MW and 1 pu by hand: 514 - sqrt(670^2 - 300^2) = -85.08 Mvar.
func TestUELAlarmQuantity(t *testing.T) {
	s := NewStore(exampleFleet(t), Options{})
	smp := Sample{UnitID: "harrowmere-1", Time: t0, PMW: 300, QMvar: -150, VKV: 20}
	if r, why := s.Accept(t0.Add(time.Minute), &smp); r != Accepted {
		t.Fatalf("%v %s", r, why)
	}
	u := s.Unit("harrowmere-1")
	u.mu.Lock()
	x := u.quantity(alarm.UEL)
	actual, limit, units := u.engineering(alarm.UEL, 0)
	u.mu.Unlock()
	want := (-150 - (514 - math.Sqrt(670*670-300*300))) / 390
	if math.Abs(x-want) > 1e-9 || actual != -150 || math.Abs(limit-(514-math.Sqrt(670*670-300*300))) > 1e-9 || units != "Mvar" {
		t.Errorf("uel quantity %v (want %v), engineering %v, %v %s", x, want, actual, limit, units)
	}
}
