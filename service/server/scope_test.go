package server_test

import (
	"context"
	"crypto/tls"
	"io"
	"net/http"
	"net/url"
	"regexp"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/types/known/durationpb"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/access"
	"github.com/genvelope/genvelope/service/server"
	"github.com/genvelope/genvelope/test/testpki"
)

// answer is what a client sees of a reply: for HTTP the status, the
// content type and the body; for gRPC the code and the message.
type answer struct {
	code        int
	contentType string
	body        string
}

// alike returns the answer for a unit id with the id replaced and the
// digits (the page's clock) blanked, so that the answers for two units
// can be compared.
func (a answer) alike(id string) answer {
	digits := regexp.MustCompile(`[0-9]`)
	a.body = digits.ReplaceAllString(strings.ReplaceAll(a.body, id, "UNIT"), "0")
	return a
}

// postAs makes one form POST to a secureServer as a basic-auth user.
func postAs(t *testing.T, p *pki, r *running, path, user string, form url.Values, accept string) answer {
	t.Helper()
	client := &http.Client{Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: p.ca.Pool(), ServerName: "localhost"}}}
	defer client.CloseIdleConnections()
	req, _ := http.NewRequest("POST", r.base+path, strings.NewReader(form.Encode()))
	req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	req.SetBasicAuth(user, reverse(user))
	if accept != "" {
		req.Header.Set("Accept", accept)
	}
	resp, err := client.Do(req)
	if err != nil {
		t.Fatalf("POST %s: %v", path, err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return answer{code: resp.StatusCode, contentType: resp.Header.Get("Content-Type"), body: string(b)}
}

// An operator acting on a unit outside its scope (another site's) gets
// exactly the answer of a unit that is not in the fleet, on HTTP (status,
// content type, page or JSON) and on gRPC (code, message), whatever else
// the request has wrong; the refusal is still audited. One the caller
// may view but not act on is answered 403 (it knows the unit exists), and
// the operator's own site is acted on.
func TestOutOfScopeActionLikeMissing(t *testing.T) {
	p := newPKI(t)
	p.clients["op-harrowmere"] = p.ca.Client(t, "op-harrowmere")
	webCfg := "tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\nbasic_auth_users:\n" +
		"  op-harrowmere: " + bcryptHash(t, reverse("op-harrowmere")) + "\n  viewer-all: " + bcryptHash(t, reverse("viewer-all")) + "\n"
	// An operator by unit pattern: a unit not in the fleet may match it.
	p.clients["op-larch"] = p.ca.Client(t, "op-larch")
	accessFile := testAccess + "  - name: op-larch\n    grants: [{role: operator, units: [\"larchwater-*\"]}]\n"
	r, audit := secureServer(t, p, func(c *server.Config) {
		c.Security.WebConfig = testpki.Write(t, p.dir, "web-operator.yaml", []byte(webCfg))
		c.Security.AccessFile = testpki.Write(t, p.dir, "access-operators.yaml", []byte(accessFile))
	})
	const hidden, missing = "larchwater-2", "larchwater-9" // another site's unit; no unit at all

	t.Run("http", func(t *testing.T) {
		for _, tc := range []struct {
			name, kind, action string
			form               url.Values
		}{
			{"acknowledge", "field", "acknowledge", nil},
			{"shelve", "field", "shelve", url.Values{"duration": {"1h"}}},
			{"shelve too long", "field", "shelve", url.Values{"duration": {"1000h"}}},
			{"unshelve", "field", "unshelve", nil},
			{"no such alarm", "nonsense", "acknowledge", nil},
			{"no such action", "field", "explode", nil},
		} {
			for _, accept := range []string{"", "application/json"} {
				t.Run(tc.name+" "+accept, func(t *testing.T) {
					path := func(id string) string { return "/units/" + id + "/alarms/" + tc.kind + "/" + tc.action }
					got := postAs(t, p, r, path(hidden), "op-harrowmere", tc.form, accept)
					want := postAs(t, p, r, path(missing), "op-harrowmere", tc.form, accept)
					if want.code != http.StatusNotFound {
						t.Fatalf("a unit not in the fleet: %d %s", want.code, want.body)
					}
					if got.alike(hidden) != want.alike(missing) {
						t.Errorf("another site's unit is answered\n%+v\nand a unit not in the fleet\n%+v", got, want)
					}
				})
			}
		}
		if got := postAs(t, p, r, "/units/"+hidden+"/alarms/field/acknowledge", "viewer-all", nil, ""); got.code != http.StatusForbidden {
			t.Errorf("the viewer of everything acknowledging: %d, want 403", got.code)
		}
		if got := postAs(t, p, r, "/units/harrowmere-1/alarms/field/acknowledge", "op-harrowmere", nil, "application/json"); got.code != http.StatusConflict {
			t.Errorf("the operator acknowledging its own site's inactive alarm: %d %s, want 409", got.code, got.body)
		}
		n := 0
		for _, e := range denialsBy(audit, "http POST /units/"+hidden+"/alarms/field/acknowledge", access.ReasonNotGranted) {
			if e.Identity == "op-harrowmere" {
				n++
			}
		}
		if n != 2 {
			t.Errorf("%d audited denials of the operator's acknowledge of %s, want 2 (page and JSON)", n, hidden)
		}
	})

	t.Run("grpc", func(t *testing.T) {
		conn := dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["op-harrowmere"])
		alarms, journal := pb.NewAlarmServiceClient(conn), pb.NewJournalServiceClient(conn)
		ctx, cancel := context.WithTimeout(context.Background(), waitLong)
		defer cancel()
		at := timestamppb.New(time.Now().Add(-time.Minute))
		for _, tc := range []struct {
			name string
			call func(id string) error
		}{
			{"acknowledge", func(id string) error {
				_, err := alarms.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: id, Limit: "field"})
				return err
			}},
			{"acknowledge no such alarm", func(id string) error {
				_, err := alarms.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: id, Limit: "nonsense"})
				return err
			}},
			{"shelve", func(id string) error {
				_, err := alarms.ShelveAlarm(ctx, &pb.ShelveAlarmRequest{UnitId: id, Limit: "field", Duration: durationpb.New(time.Hour)})
				return err
			}},
			{"shelve too long", func(id string) error {
				_, err := alarms.ShelveAlarm(ctx, &pb.ShelveAlarmRequest{UnitId: id, Limit: "field", Duration: durationpb.New(1000 * time.Hour)})
				return err
			}},
			{"reset thermal", func(id string) error {
				_, err := journal.ResetThermal(ctx, &pb.ResetThermalRequest{UnitId: id, Reason: "test"})
				return err
			}},
			{"reset thermal of no winding", func(id string) error {
				_, err := journal.ResetThermal(ctx, &pb.ResetThermalRequest{UnitId: id, Winding: "rotor cage"})
				return err
			}},
			{"discard sample", func(id string) error {
				_, err := journal.DiscardSample(ctx, &pb.DiscardSampleRequest{UnitId: id, Time: at})
				return err
			}},
		} {
			t.Run(tc.name, func(t *testing.T) {
				asAnswer := func(err error, id string) answer {
					s := status.Convert(err)
					return answer{code: int(s.Code()), body: s.Message()}.alike(id)
				}
				got, want := asAnswer(tc.call(hidden), hidden), asAnswer(tc.call(missing), missing)
				if want.code != int(codes.NotFound) {
					t.Fatalf("a unit not in the fleet: %+v", want)
				}
				if got != want {
					t.Errorf("another site's unit is answered %+v, a unit not in the fleet %+v", got, want)
				}
			})
		}
		// The operator by pattern: a unit outside it, and one inside it
		// that is not in the fleet, are answered alike (the guard answers
		// both before the handler reads the limit).
		larch := pb.NewAlarmServiceClient(dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["op-larch"]))
		for _, limit := range []string{"field", "nonsense"} {
			_, errOut := larch.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: "harrowmere-1", Limit: limit})
			_, errIn := larch.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: "larchwater-9", Limit: limit})
			out := answer{code: int(status.Code(errOut)), body: status.Convert(errOut).Message()}.alike("harrowmere-1")
			in := answer{code: int(status.Code(errIn)), body: status.Convert(errIn).Message()}.alike("larchwater-9")
			if in.code != int(codes.NotFound) || out != in {
				t.Errorf("limit %s: a unit outside the pattern answered %+v, one inside it not in the fleet %+v", limit, out, in)
			}
		}
		if got := audit.Find("grpc acknowledge", access.OutcomeFailed); len(got) != 2 || got[0].Identity != "op-larch" {
			t.Errorf("the pattern operator's acknowledges of a unit not in the fleet in the audit: %+v, want 2 failed", got)
		}
		if n := len(denialsBy(audit, "grpc "+pb.AlarmService_AcknowledgeAlarm_FullMethodName, access.ReasonNotGranted)); n < 2 {
			t.Errorf("%d audited denials of gRPC acknowledges, want those of %s", n, hidden)
		}
		// The viewer of everything may see the unit but not act on it.
		viewer := pb.NewAlarmServiceClient(dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["viewer-all"]))
		if _, err := viewer.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: hidden, Limit: "field"}); status.Code(err) != codes.PermissionDenied {
			t.Errorf("the viewer of everything acknowledging: %v, want PERMISSION_DENIED", err)
		}
	})
}
