package docs

import (
	"io/fs"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
)

// Everything the project cites is inside it: no file names the first
// round's shared notes, every file cited under docs/ exists, and every section
// cited as docs/references.md "Name" or docs/contracts.md "Name" is a heading
// of that file.
func TestCitationsPointInsideTheRepository(t *testing.T) {
	root := ".."
	forbidden := []string{"DESIGN" + ".md", "REFERENCES" + ".md", "/work/" + "shared", "../" + "shared"}
	docRE := regexp.MustCompile(`docs/([a-z0-9-]+\.md)`)
	secRE := regexp.MustCompile(`docs/(references|contracts)\.md[,:]?\s*\(?"([^"]+)"`)
	headings := map[string]map[string]bool{}
	for _, name := range []string{"references", "contracts"} {
		b, err := os.ReadFile(name + ".md")
		if err != nil {
			t.Fatal(err)
		}
		headings[name] = map[string]bool{}
		for _, l := range strings.Split(string(b), "\n") {
			if strings.HasPrefix(l, "#") {
				headings[name][strings.TrimSpace(strings.TrimLeft(l, "#"))] = true
			}
		}
	}
	files := 0
	err := filepath.WalkDir(root, func(path string, d fs.DirEntry, err error) error {
		if err != nil {
			return err
		}
		if d.IsDir() {
			switch d.Name() {
			case ".git", ".cache", "node_modules", "vendor":
				return filepath.SkipDir
			}
			return nil
		}
		switch filepath.Ext(path) {
		case ".go", ".md", ".yaml", ".yml", ".sh", ".proto", ".html", ".js":
		default:
			return nil
		}
		b, err := os.ReadFile(path)
		if err != nil {
			return err
		}
		files++
		text := string(b)
		for i, line := range strings.Split(text, "\n") {
			for _, f := range forbidden {
				if strings.Contains(line, f) {
					t.Errorf("%s:%d cites %q, which is not in the repository: cite docs/contracts.md or docs/references.md", path, i+1, f)
				}
			}
		}
		for _, m := range docRE.FindAllStringSubmatch(text, -1) {
			if _, err := os.Stat(m[1]); err != nil {
				t.Errorf("%s cites docs/%s, which does not exist", path, m[1])
			}
		}
		// Sections are cited on one line or across a comment's line break.
		flat := strings.Join(strings.Fields(strings.ReplaceAll(text, "//", " ")), " ")
		for _, m := range secRE.FindAllStringSubmatch(flat, -1) {
			if filepath.Base(path) == "citations_test.go" {
				break // this file's own patterns
			}
			found := false
			for h := range headings[m[1]] {
				// A heading may carry a note in brackets after its name.
				found = found || h == m[2] || strings.HasPrefix(h, m[2]+" (")
			}
			if !found {
				t.Errorf("%s cites docs/%s.md section %q, which has no such heading", path, m[1], m[2])
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if files < 100 {
		t.Fatalf("walked only %d files from %s: the check is not looking at the repository", files, root)
	}
}
