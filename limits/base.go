package limits

import "math"

// Base converts between engineering units at the edges of the package
// and the per-unit system used inside it. The zero Base is not usable.
type Base struct {
	MVA         float64 // rated apparent power, MVA
	KV          float64 // rated line-line terminal voltage, kV
	FrequencyHz float64 // rated frequency, Hz
	IFagA       float64 // field current on the air-gap line at rated voltage, open circuit, A
}

// PowerPU converts MW or Mvar to pu of rated MVA.
func (b Base) PowerPU(mw float64) float64 { return mw / b.MVA }

// PowerMW converts pu of rated MVA to MW (or Mvar).
func (b Base) PowerMW(pu float64) float64 { return pu * b.MVA }

// VoltagePU converts line-line kV to pu of rated voltage.
func (b Base) VoltagePU(kv float64) float64 { return kv / b.KV }

// VoltageKV converts pu to line-line kV.
func (b Base) VoltageKV(pu float64) float64 { return pu * b.KV }

// FrequencyPU converts Hz to pu of rated frequency.
func (b Base) FrequencyPU(hz float64) float64 { return hz / b.FrequencyHz }

// FieldPU converts field amperes to pu of IFag.
func (b Base) FieldPU(a float64) float64 { return a / b.IFagA }

// FieldA converts pu of IFag to field amperes.
func (b Base) FieldA(pu float64) float64 { return pu * b.IFagA }

// CurrentA returns the base armature current, S_base/(sqrt(3) V_base), in A.
func (b Base) CurrentA() float64 { return b.MVA * 1e3 / (math.Sqrt(3) * b.KV) }
