package access

import (
	"context"
	"log/slog"
	"time"
)

// Outcomes of an audit entry.
const (
	OutcomeDenied = "denied"
	OutcomeDone   = "done"
	OutcomeFailed = "failed"
)

// Entry is one audited event: a denied call, an operator action, a
// reload.
type Entry struct {
	Time     time.Time
	Identity string // the caller's identity, or "anonymous"
	Source   string // network address
	Action   string // e.g. "grpc /genvelope.v1.AlarmService/ShelveAlarm", "web acknowledge", "reload"
	Target   string // unit/alarm or file, "" when none
	Outcome  string // OutcomeDenied, OutcomeDone, OutcomeFailed
	Reason   string // why denied
	Detail   string
}

// Auditor receives audit entries. Audit must not block for long: it is
// called on the request path.
type Auditor interface {
	Audit(ctx context.Context, e Entry)
}

// LogAuditor writes entries to a structured log, at WARN for denials
// and INFO otherwise, with the message "audit".
type LogAuditor struct{ Log *slog.Logger }

// Audit logs e.
func (a LogAuditor) Audit(ctx context.Context, e Entry) {
	lvl := slog.LevelInfo
	if e.Outcome == OutcomeDenied {
		lvl = slog.LevelWarn
	}
	a.Log.LogAttrs(ctx, lvl, "audit",
		slog.Time("at", e.Time), slog.String("identity", e.Identity), slog.String("source", e.Source),
		slog.String("action", e.Action), slog.String("target", e.Target), slog.String("outcome", e.Outcome),
		slog.String("reason", e.Reason), slog.String("detail", e.Detail))
}

// Auditors sends every entry to each of its members.
type Auditors []Auditor

// Audit passes e on.
func (as Auditors) Audit(ctx context.Context, e Entry) {
	for _, a := range as {
		a.Audit(ctx, e)
	}
}
