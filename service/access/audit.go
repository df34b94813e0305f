package access

import (
	"context"
	"log/slog"
	"strings"
	"sync"
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

// Memory keeps audit entries in memory, in order (tests; a status
// page). The zero value is ready.
type Memory struct {
	mu      sync.Mutex
	entries []Entry
}

// Audit keeps e.
func (m *Memory) Audit(_ context.Context, e Entry) {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.entries = append(m.entries, e)
}

// Find returns the entries whose action starts with actionPrefix and
// whose outcome is outcome ("" for any).
func (m *Memory) Find(actionPrefix, outcome string) []Entry {
	m.mu.Lock()
	defer m.mu.Unlock()
	var out []Entry
	for _, e := range m.entries {
		if strings.HasPrefix(e.Action, actionPrefix) && (outcome == "" || e.Outcome == outcome) {
			out = append(out, e)
		}
	}
	return out
}
