// Package testpki makes certificate authorities and certificates for
// tests (crypto/x509, ECDSA P-256) and writes them as PEM files.
package testpki

import (
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"time"
)

// Fataler is what the helpers need of a test (testing.TB has it); a
// program passes its own, which turns Fatal into an error.
type Fataler interface {
	Helper()
	Fatal(args ...any)
}

// CA is a test certificate authority.
type CA struct {
	Cert *x509.Certificate
	Key  *ecdsa.PrivateKey
	PEM  []byte
}

// Leaf is a certificate and its key, as PEM and as a tls.Certificate.
type Leaf struct {
	CertPEM, KeyPEM []byte
	TLS             tls.Certificate
}

func serial(t Fataler) *big.Int {
	n, err := rand.Int(rand.Reader, new(big.Int).Lsh(big.NewInt(1), 62))
	if err != nil {
		t.Fatal(err)
	}
	return n
}

// NewCA returns a new authority named cn.
func NewCA(t Fataler, cn string) *CA {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{
		SerialNumber: serial(t), Subject: pkix.Name{CommonName: cn},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(24 * time.Hour),
		IsCA: true, BasicConstraintsValid: true, KeyUsage: x509.KeyUsageCertSign | x509.KeyUsageDigitalSignature,
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	cert, _ := x509.ParseCertificate(der)
	return &CA{Cert: cert, Key: key, PEM: pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der})}
}

// Options of a leaf certificate.
type Options struct {
	CN       string
	DNS      []string
	IPs      []net.IP
	Server   bool      // server authentication (else client)
	NotAfter time.Time // default a day from now
}

// Issue returns a certificate signed by ca.
func (ca *CA) Issue(t Fataler, o Options) *Leaf {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	if o.NotAfter.IsZero() {
		o.NotAfter = time.Now().Add(24 * time.Hour)
	}
	usage := x509.ExtKeyUsageClientAuth
	if o.Server {
		usage = x509.ExtKeyUsageServerAuth
	}
	tmpl := &x509.Certificate{
		SerialNumber: serial(t), Subject: pkix.Name{CommonName: o.CN}, DNSNames: o.DNS, IPAddresses: o.IPs,
		NotBefore: time.Now().Add(-48 * time.Hour), NotAfter: o.NotAfter,
		KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: []x509.ExtKeyUsage{usage},
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, ca.Cert, &key.PublicKey, ca.Key)
	if err != nil {
		t.Fatal(err)
	}
	kd, err := x509.MarshalPKCS8PrivateKey(key)
	if err != nil {
		t.Fatal(err)
	}
	l := &Leaf{CertPEM: pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der}), KeyPEM: pem.EncodeToMemory(&pem.Block{Type: "PRIVATE KEY", Bytes: kd})}
	if l.TLS, err = tls.X509KeyPair(l.CertPEM, l.KeyPEM); err != nil {
		t.Fatal(err)
	}
	return l
}

// Server returns a server certificate for the loopback names.
func (ca *CA) Server(t Fataler) *Leaf {
	return ca.Issue(t, Options{CN: "genvelope-test", DNS: []string{"localhost"}, IPs: []net.IP{net.IPv4(127, 0, 0, 1), net.IPv6loopback}, Server: true})
}

// Client returns a client certificate with subject CN cn.
func (ca *CA) Client(t Fataler, cn string) *Leaf { return ca.Issue(t, Options{CN: cn}) }

// Pool returns a pool holding ca.
func (ca *CA) Pool() *x509.CertPool {
	p := x509.NewCertPool()
	p.AddCert(ca.Cert)
	return p
}

// Write writes data to dir/name and returns the path.
func Write(t Fataler, dir, name string, data []byte) string {
	t.Helper()
	p := filepath.Join(dir, name)
	// Write then rename, as a certificate renewal does, so a reader never
	// sees half a file.
	tmp := p + ".tmp"
	if err := os.WriteFile(tmp, data, 0o600); err != nil {
		t.Fatal(err)
	}
	if err := os.Rename(tmp, p); err != nil {
		t.Fatal(err)
	}
	return p
}

// WriteLeaf writes l as dir/name.crt and dir/name.key and returns both
// paths.
func WriteLeaf(t Fataler, dir, name string, l *Leaf) (certPath, keyPath string) {
	return Write(t, dir, name+".crt", l.CertPEM), Write(t, dir, name+".key", l.KeyPEM)
}
