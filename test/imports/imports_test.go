// Package imports_test holds the packages to the import rules of
// DEVELOPERS.md: the "may import" column of its layout table, read from
// the file itself, against the imports `go list -json ./...` reports.
package imports_test

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"
)

const module = "github.com/genvelope/genvelope"

// rule is one row of the layout table.
type rule struct {
	path     string   // a package ("service/fleet") or, ending in "/", a tree ("limits/")
	allowed  []string // packages or trees, of the module (relative) or outside it (full)
	anything bool
}

func (r rule) matches(pkg string) bool {
	if strings.HasSuffix(r.path, "/") {
		return pkg+"/" == r.path || strings.HasPrefix(pkg, r.path)
	}
	return pkg == r.path
}

// allows reports whether the rule lets its package import imp (module
// packages relative to the module, others in full).
func (r rule) allows(imp string) bool {
	if r.anything {
		return true
	}
	for _, a := range r.allowed {
		if imp == a || strings.HasSuffix(a, "/") && strings.HasPrefix(imp, a) ||
			!strings.HasSuffix(a, "/") && strings.HasPrefix(imp, a+"/") {
			return true
		}
	}
	return false
}

var backticked = regexp.MustCompile("`([^`]+)`")

// readRules reads the layout table of DEVELOPERS.md.
func readRules(t *testing.T, root string) []rule {
	t.Helper()
	f, err := os.Open(filepath.Join(root, "DEVELOPERS.md"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	var rules []rule
	sc := bufio.NewScanner(f)
	inTable := false
	for sc.Scan() {
		line := sc.Text()
		if strings.HasPrefix(line, "| path | what lives there | may import |") {
			inTable = true
			continue
		}
		if !inTable {
			continue
		}
		if !strings.HasPrefix(line, "|") {
			break
		}
		cells := strings.Split(strings.Trim(line, "|"), "|")
		if len(cells) < 3 || strings.HasPrefix(strings.TrimSpace(cells[0]), "---") {
			continue
		}
		path := backticked.FindStringSubmatch(cells[0])
		if path == nil {
			t.Fatalf("DEVELOPERS.md: a layout row without a `path`: %s", line)
		}
		last := cells[len(cells)-1]
		r := rule{path: path[1], anything: strings.TrimSpace(last) == "anything"}
		for _, m := range backticked.FindAllStringSubmatch(last, -1) {
			r.allowed = append(r.allowed, m[1])
		}
		rules = append(rules, r)
	}
	if err := sc.Err(); err != nil {
		t.Fatal(err)
	}
	if len(rules) < 10 {
		t.Fatalf("DEVELOPERS.md: found %d rows in the layout table; is its header still \"| path | what lives there | may import |\"?", len(rules))
	}
	return rules
}

type goPackage struct {
	ImportPath string
	Imports    []string
	Standard   bool
}

// listPackages runs go list -json ./... at the module root.
func listPackages(t *testing.T, root string) []goPackage {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	cmd := exec.CommandContext(ctx, "go", "list", "-json", "./...")
	cmd.Dir = root
	out, err := cmd.Output()
	if err != nil {
		var ee *exec.ExitError
		if errors.As(err, &ee) {
			t.Fatalf("go list: %v\n%s", err, ee.Stderr)
		}
		t.Fatalf("go list: %v", err)
	}
	var pkgs []goPackage
	dec := json.NewDecoder(strings.NewReader(string(out)))
	for {
		var p goPackage
		if err := dec.Decode(&p); errors.Is(err, io.EOF) {
			break
		} else if err != nil {
			t.Fatal(err)
		}
		pkgs = append(pkgs, p)
	}
	return pkgs
}

// standard reports whether an import path is of the standard library:
// its first element has no dot.
func standard(imp string) bool {
	first, _, _ := strings.Cut(imp, "/")
	return !strings.Contains(first, ".")
}

// Every package imports only what its row of the layout table allows
// (tests excepted), and every package has a row.
func TestImportsFollowTheLayoutTable(t *testing.T) {
	root, err := filepath.Abs(filepath.Join("..", ".."))
	if err != nil {
		t.Fatal(err)
	}
	rules := readRules(t, root)
	for _, p := range listPackages(t, root) {
		rel := strings.TrimPrefix(strings.TrimPrefix(p.ImportPath, module), "/")
		var r *rule
		for i := range rules {
			if rules[i].matches(rel) && (r == nil || len(rules[i].path) > len(r.path)) {
				r = &rules[i]
			}
		}
		if r == nil {
			t.Errorf("%s has no row in the layout table of DEVELOPERS.md; add one with what it may import", rel)
			continue
		}
		for _, imp := range p.Imports {
			if standard(imp) {
				continue
			}
			name := imp
			if strings.HasPrefix(imp, module+"/") {
				name = strings.TrimPrefix(imp, module+"/")
			}
			if !r.allows(name) {
				t.Errorf("%s imports %s, which its row (`%s`) of DEVELOPERS.md does not allow (allowed: %s); change the code or, if the design changed, the table",
					rel, name, r.path, strings.Join(r.allowed, ", "))
			}
		}
	}
}

// The checker itself: a tree row covers its subpackages; a package row
// allows the subpackages of an allowed module path.
func TestRuleMatching(t *testing.T) {
	r := rule{path: "limits/", allowed: []string{"gonum.org/v1/gonum", "api/"}}
	for _, tc := range []struct {
		pkg, imp string
		match    bool
		allow    bool
	}{
		{"limits", "gonum.org/v1/gonum/interp", true, true},
		{"limits/sub", "gonum.org/v1/gonumx", true, false},
		{"limitsx", "api/genvelope/v1", false, true},
		{"limits", "service/fleet", true, false},
	} {
		if got := r.matches(tc.pkg); got != tc.match {
			t.Errorf("matches(%q) = %v", tc.pkg, got)
		}
		if got := r.allows(tc.imp); got != tc.allow {
			t.Errorf("allows(%q) = %v", tc.imp, got)
		}
	}
}
