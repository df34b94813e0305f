package alarm

import (
	"sync"
	"sync/atomic"
)

// Hub fans alarm events out to watchers. Publishing never waits: each
// watcher has a bounded buffer, and a watcher whose buffer is full is
// dropped (its Overflowed channel is closed) so that ingest is never
// held up by a slow reader.
type Hub struct {
	mu       sync.Mutex
	watchers map[*Watcher]struct{}
	n        atomic.Int32 // len(watchers), readable without the lock
}

// NewHub returns a hub with no watchers.
func NewHub() *Hub { return &Hub{watchers: map[*Watcher]struct{}{}} }

// Watcher receives events. Read C until Done or Overflowed.
type Watcher struct {
	C          chan Event    // the events, in order
	Overflowed chan struct{} // closed when the watcher fell too far behind and was dropped
	filter     func(*Event) bool
	hub        *Hub
	once       sync.Once
}

// Watch registers a watcher with a buffer of size events; filter, when
// not nil, selects the events it wants. Close it when done.
func (h *Hub) Watch(size int, filter func(*Event) bool) *Watcher {
	w := &Watcher{C: make(chan Event, size), Overflowed: make(chan struct{}), filter: filter, hub: h}
	h.mu.Lock()
	h.watchers[w] = struct{}{}
	h.n.Store(int32(len(h.watchers)))
	h.mu.Unlock()
	return w
}

// Close unregisters the watcher.
func (w *Watcher) Close() {
	w.hub.mu.Lock()
	delete(w.hub.watchers, w)
	w.hub.n.Store(int32(len(w.hub.watchers)))
	w.hub.mu.Unlock()
}

// Publish sends ev to every watcher that wants it, without waiting.
func (h *Hub) Publish(ev Event) {
	h.mu.Lock()
	defer h.mu.Unlock()
	for w := range h.watchers {
		if w.filter != nil && !w.filter(&ev) {
			continue
		}
		select {
		case w.C <- ev:
		default:
			delete(h.watchers, w)
			h.n.Store(int32(len(h.watchers)))
			w.once.Do(func() { close(w.Overflowed) })
		}
	}
}

// Watched reports whether any watcher is registered, without waiting:
// a publisher may skip building events nobody will read.
func (h *Hub) Watched() bool { return h.n.Load() > 0 }

// Watchers returns the number of registered watchers.
func (h *Hub) Watchers() int { return int(h.n.Load()) }
