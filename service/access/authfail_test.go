package access

import (
	"context"
	"crypto/x509"
	"crypto/x509/pkix"
	"errors"
	"fmt"
	"strings"
	"testing"
	"time"

	dto "github.com/prometheus/client_model/go"
)

// The flood gate: a source failing again and again writes GateBurst
// entries in a window and one summary with the count of the rest once
// the window is over; another source, or another reason, has a window of
// its own; the metric counts every failure.
func TestAuthFailureGate(t *testing.T) {
	now := time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)
	mem := &Memory{}
	g, err := NewGuard(Options{Auditor: mem, Now: func() time.Time { return now }})
	if err != nil {
		t.Fatal(err)
	}
	fail := func(src, reason string) {
		g.AuthFailed(context.Background(), AuthFailure{Source: src, Claimed: "mallory", Action: "http GET /", Reason: reason})
	}
	for i := 0; i < 20; i++ {
		fail(fmt.Sprintf("192.0.2.7:%d", 40000+i), ReasonBadPassword) // one host, many ports
		now = now.Add(time.Second)
	}
	fail("192.0.2.8:40000", ReasonBadPassword)
	fail("192.0.2.7:40100", ReasonUnknownUser)
	got := mem.Find("http", OutcomeDenied)
	if len(got) != GateBurst+2 {
		t.Fatalf("%d entries within the window, want %d (the burst of one source, and the two others)", len(got), GateBurst+2)
	}
	if !strings.Contains(got[GateBurst-1].Detail, "counted and summarised") {
		t.Errorf("the burst's last entry says nothing of what follows: %q", got[GateBurst-1].Detail)
	}
	if got[0].Identity != "mallory (not authenticated)" || got[0].Reason != ReasonBadPassword || got[0].Source != "192.0.2.7:40000" {
		t.Errorf("first entry %+v", got[0])
	}
	now = now.Add(GateWindow)
	fail("192.0.2.7:41000", ReasonBadPassword)
	got = mem.Find("http", OutcomeDenied)
	if len(got) != GateBurst+4 {
		t.Fatalf("%d entries after the window, want the summary and the new failure too (%d)", len(got), GateBurst+4)
	}
	sum := got[GateBurst+2]
	if !strings.HasPrefix(sum.Detail, "15 more like this from 192.0.2.7") {
		t.Errorf("summary %q, want the 15 not written", sum.Detail)
	}
	// A window over with nothing after it: FlushGate writes its summary.
	for i := 0; i < GateBurst+3; i++ {
		fail("192.0.2.9:40000", ReasonNoCertificate)
	}
	now = now.Add(GateWindow)
	g.FlushGate(context.Background(), now)
	if got := denialsBy(mem, ReasonNoCertificate); len(got) != GateBurst+1 || !strings.HasPrefix(got[GateBurst].Detail, "3 more like this from 192.0.2.9") {
		t.Errorf("after FlushGate: %d entries, last %+v; want the burst and a summary of 3", len(got), got[len(got)-1])
	}
	var m dto.Metric
	if err := g.denied.WithLabelValues(ReasonBadPassword).Write(&m); err != nil {
		t.Fatal(err)
	}
	if v := m.GetCounter().GetValue(); v != 22 {
		t.Errorf("bad_password counted %v, want 22 (every failure)", v)
	}
}

func denialsBy(m *Memory, reason string) []Entry {
	var out []Entry
	for _, e := range m.Find("", OutcomeDenied) {
		if e.Reason == reason {
			out = append(out, e)
		}
	}
	return out
}

// The verifier's errors name the certificate that failed: its subject
// is the claimed identity.
func TestClassifyTLSError(t *testing.T) {
	leaf := &x509.Certificate{Subject: pkix.Name{CommonName: "gw-north"}}
	for _, tc := range []struct {
		name          string
		err           error
		reason, claim string
	}{
		{"another CA", x509.UnknownAuthorityError{Cert: leaf}, ReasonBadCertificate, "gw-north"},
		{"expired", x509.CertificateInvalidError{Cert: leaf, Reason: x509.Expired}, ReasonExpiredCertificate, "gw-north"},
		{"wrong use", x509.CertificateInvalidError{Cert: leaf, Reason: x509.IncompatibleUsage}, ReasonBadCertificate, "gw-north"},
		{"none", errors.New("tls: client didn't provide a certificate"), ReasonNoCertificate, ""},
		{"net/http's text", errors.New("tls: failed to verify certificate: x509: certificate has expired or is not yet valid: current time"), ReasonExpiredCertificate, ""},
		{"plaintext", errors.New("tls: first record does not look like a TLS handshake"), ReasonHandshake, ""},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r, c := ClassifyTLSError(tc.err)
			if r != tc.reason || c != tc.claim {
				t.Errorf("got %q %q, want %q %q", r, c, tc.reason, tc.claim)
			}
		})
	}
}
