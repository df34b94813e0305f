package ingest

import (
	"context"
	"errors"
	"time"

	"github.com/genvelope/genvelope/service/alarm"
)

// Actions are the operator actions on alarms. The store applies them
// directly (StoreActions); a replicated service writes them to its log
// first and applies them in log order on every replica.
type Actions interface {
	Acknowledge(ctx context.Context, id string, k alarm.Kind, now time.Time, by string) error
	// Shelve suppresses the alarm until until; a zero until lifts the shelf.
	Shelve(ctx context.Context, id string, k alarm.Kind, until, now time.Time, by string) error
	// ResetThermal clears a unit's thermal accumulators (Store.ResetThermal).
	ResetThermal(ctx context.Context, id, winding string, now time.Time, by, reason string) error
	// DiscardSample discards one recent sample's thermal effect
	// (Store.DiscardSample).
	DiscardSample(ctx context.Context, id string, at, now time.Time, by, reason string) error
}

// StoreActions applies operator actions to the store directly.
type StoreActions struct{ Store *Store }

// Acknowledge implements Actions.
func (a StoreActions) Acknowledge(_ context.Context, id string, k alarm.Kind, now time.Time, by string) error {
	return a.Store.Acknowledge(id, k, now, by)
}

// Shelve implements Actions.
func (a StoreActions) Shelve(_ context.Context, id string, k alarm.Kind, until, now time.Time, by string) error {
	return a.Store.Shelve(id, k, until, now, by)
}

// ResetThermal implements Actions.
func (a StoreActions) ResetThermal(_ context.Context, id, winding string, now time.Time, by, reason string) error {
	return a.Store.ResetThermal(id, winding, now, by, reason)
}

// DiscardSample implements Actions.
func (a StoreActions) DiscardSample(_ context.Context, id string, at, now time.Time, by, reason string) error {
	return a.Store.DiscardSample(id, at, now, by, reason)
}

// ErrUnavailable is returned by Actions that could not be written to the
// log: nothing was done, and the action may be tried again.
var ErrUnavailable = errors.New("the log is unavailable")
