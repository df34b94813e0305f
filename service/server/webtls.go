package server

import (
	"bytes"
	"context"
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"sync"
	"time"

	"github.com/prometheus/exporter-toolkit/web"
	"go.yaml.in/yaml/v3"

	"github.com/genvelope/genvelope/service/access"
)

// webTLS terminates the HTTP listener's TLS itself, with the TLS
// configuration the exporter-toolkit builds from the web configuration
// file (web.ConfigToTLSConfig, read again for every connection as the
// toolkit does), so that a refused client certificate can be audited
// with the subject it claimed: net/http reports a failed handshake only
// as text in its error log, without the certificate. The toolkit keeps
// everything else of the file (basic-auth users, rate limit, headers),
// read from a copy without tls_server_config that follows the file.
type webTLS struct {
	path    string // the operator's web configuration
	derived string // the copy for the toolkit
	guard   *access.Guard
	// handshake bounds a TLS handshake (net/http's rule: the least of
	// its header, read and write timeouts).
	handshake time.Duration

	mu      sync.Mutex
	modTime time.Time
	size    int64
}

// newWebTLS prepares the copy of path at copyPath; the caller removes it.
func newWebTLS(path, copyPath string, g *access.Guard, srv *http.Server) (*webTLS, error) {
	// net/http's bound on a handshake: the least of its timeouts.
	hs := time.Duration(0)
	for _, v := range []time.Duration{srv.ReadHeaderTimeout, srv.ReadTimeout, srv.WriteTimeout} {
		if v > 0 && (hs == 0 || v < hs) {
			hs = v
		}
	}
	if hs == 0 {
		hs = 10 * time.Second
	}
	w := &webTLS{path: path, derived: copyPath, guard: g, handshake: hs}
	if err := w.sync(); err != nil {
		return nil, err
	}
	return w, nil
}

// sync writes the toolkit's copy again when the file changed (checked
// on every connection and request, as the toolkit reads the file on
// every request). A file that does not parse is copied as it is, so
// that the toolkit refuses it as it would the file itself; a file that
// cannot be read removes the copy.
func (w *webTLS) sync() error {
	w.mu.Lock()
	defer w.mu.Unlock()
	fi, err := os.Stat(w.path)
	if err == nil && fi.ModTime().Equal(w.modTime) && fi.Size() == w.size {
		return nil
	}
	var data []byte
	if err == nil {
		data, err = os.ReadFile(w.path)
	}
	if err != nil {
		// Gone or unreadable: so is the copy, and the toolkit refuses
		// requests as it would without the file.
		os.Remove(w.derived)
		w.modTime, w.size = time.Time{}, -1
		return fmt.Errorf("web config: %w", err)
	}
	out := data
	var doc yaml.Node
	if yaml.Unmarshal(data, &doc) == nil && len(doc.Content) == 1 && doc.Content[0].Kind == yaml.MappingNode {
		m := doc.Content[0]
		for i := 0; i+1 < len(m.Content); i += 2 {
			if m.Content[i].Value == "tls_server_config" {
				m.Content = append(m.Content[:i], m.Content[i+2:]...)
				break
			}
		}
		var buf bytes.Buffer
		enc := yaml.NewEncoder(&buf)
		if err := enc.Encode(&doc); err == nil && enc.Close() == nil {
			out = buf.Bytes()
		}
	}
	tmp := w.derived + ".tmp"
	if err := os.WriteFile(tmp, out, 0o600); err != nil {
		return fmt.Errorf("web config copy: %w", err)
	}
	if err := os.Rename(tmp, w.derived); err != nil {
		return fmt.Errorf("web config copy: %w", err)
	}
	w.modTime, w.size = fi.ModTime(), fi.Size()
	return nil
}

// config returns one connection's TLS configuration: the file's, built
// by the toolkit, with the toolkit's defaults and its HTTP/2 choice.
func (w *webTLS) config(*tls.ClientHelloInfo) (*tls.Config, error) {
	data, err := os.ReadFile(w.path)
	if err != nil {
		return nil, err
	}
	c := web.Config{
		TLSConfig:  web.TLSConfig{MinVersion: tls.VersionTLS12, MaxVersion: tls.VersionTLS13},
		HTTPConfig: web.HTTPConfig{HTTP2: true},
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	if err := dec.Decode(&c); err != nil && !errors.Is(err, io.EOF) {
		return nil, fmt.Errorf("web config %s: %w", w.path, err)
	}
	c.TLSConfig.SetDirectory(filepath.Dir(w.path))
	cfg, err := web.ConfigToTLSConfig(&c.TLSConfig)
	if err != nil {
		return nil, fmt.Errorf("web config %s: %w", w.path, err)
	}
	cfg.NextProtos = []string{"http/1.1"}
	if c.HTTPConfig.HTTP2 {
		cfg.NextProtos = []string{"h2", "http/1.1"}
	}
	return cfg, nil
}

// listen returns ln with TLS: Accept returns connections whose handshake
// is done. A failed handshake is audited with its reason and the
// subject of the certificate presented, as on gRPC (capCreds); one
// closed before the handshake (EOF: a port probe) is not.
func (w *webTLS) listen(ln net.Listener) *tlsListener {
	l := &tlsListener{Listener: ln, w: w, results: make(chan accepted), done: make(chan struct{})}
	go l.loop()
	return l
}

type accepted struct {
	conn net.Conn
	err  error
}

type tlsListener struct {
	net.Listener
	w       *webTLS
	results chan accepted
	done    chan struct{}
	once    sync.Once
}

// loop accepts until the listener is closed; an error reaches Accept
// (http.Server backs off on temporary ones before it asks again).
func (l *tlsListener) loop() {
	for {
		c, err := l.Listener.Accept()
		if err != nil {
			select {
			case l.results <- accepted{err: err}:
			case <-l.done:
				return
			}
			if errors.Is(err, net.ErrClosed) {
				return
			}
			continue
		}
		go l.handshake(c)
	}
}

func (l *tlsListener) handshake(c net.Conn) {
	l.w.sync() // a failure removes the copy: the toolkit then refuses the connection's requests
	// The certificate a check after the chain's (the toolkit's
	// client_allowed_sans) refused: its error does not carry it.
	var refused *x509.Certificate
	tc := tls.Server(c, &tls.Config{GetConfigForClient: func(hello *tls.ClientHelloInfo) (*tls.Config, error) {
		cfg, err := l.w.config(hello)
		if err != nil || cfg.VerifyPeerCertificate == nil {
			return cfg, err
		}
		check := cfg.VerifyPeerCertificate
		cfg.VerifyPeerCertificate = func(raw [][]byte, chains [][]*x509.Certificate) error {
			err := check(raw, chains)
			if err != nil && len(raw) > 0 {
				refused, _ = x509.ParseCertificate(raw[0])
			}
			return err
		}
		return cfg, nil
	}})
	ctx, cancel := context.WithTimeout(context.Background(), l.w.handshake)
	err := tc.HandshakeContext(ctx)
	cancel()
	if err != nil {
		var re tls.RecordHeaderError
		if errors.As(err, &re) && re.Conn != nil && looksLikeHTTP(re.RecordHeader) {
			// As net/http answers plain HTTP on a TLS port.
			io.WriteString(re.Conn, "HTTP/1.0 400 Bad Request\r\n\r\nClient sent an HTTP request to an HTTPS server.\n")
		}
		c.Close()
		if errors.Is(err, io.EOF) {
			return // closed before the handshake: a port probe, no attempt to authenticate
		}
		reason, claimed := access.ClassifyTLSError(err)
		if refused != nil {
			reason, claimed = access.ReasonBadCertificate, access.CertName(refused)
		}
		l.w.guard.AuthFailed(context.Background(), access.AuthFailure{Source: c.RemoteAddr().String(), Claimed: claimed,
			Action: "http connect", Reason: reason, Detail: err.Error()})
		return
	}
	select {
	case l.results <- accepted{conn: tc}:
	case <-l.done:
		tc.Close()
	}
}

// looksLikeHTTP reports whether a TLS record header is the start of a
// plaintext HTTP request (net/http's test).
func looksLikeHTTP(hdr [5]byte) bool {
	switch string(hdr[:]) {
	case "GET /", "HEAD ", "POST ", "PUT /", "OPTIO":
		return true
	}
	return false
}

func (l *tlsListener) Accept() (net.Conn, error) {
	select {
	case r := <-l.results:
		return r.conn, r.err
	case <-l.done:
		return nil, net.ErrClosed
	}
}

func (l *tlsListener) Close() error {
	var err error
	l.once.Do(func() {
		close(l.done)
		err = l.Listener.Close()
	})
	return err
}

// quietTLSLog drops the toolkit's "TLS is disabled" line (it serves the
// copy without TLS; the TLS is ours) and says what is true.
type quietTLSLog struct{ slog.Handler }

func (q quietTLSLog) Handle(ctx context.Context, r slog.Record) error {
	if r.Message == "TLS is disabled." {
		out := slog.NewRecord(r.Time, r.Level, "TLS is enabled (genvelope makes the handshake with the web configuration's tls_server_config).", r.PC)
		r.Attrs(func(a slog.Attr) bool {
			if a.Key != "http2" { // the toolkit's word for the copy; the file's choice holds
				out.AddAttrs(a)
			}
			return true
		})
		r = out
	}
	return q.Handler.Handle(ctx, r)
}

func (q quietTLSLog) WithAttrs(as []slog.Attr) slog.Handler {
	return quietTLSLog{q.Handler.WithAttrs(as)}
}
func (q quietTLSLog) WithGroup(n string) slog.Handler { return quietTLSLog{q.Handler.WithGroup(n)} }
