package web

import (
	"strings"
	"testing"

	"github.com/pulsefleet/pulsefleet/internal/caution"
)

// The page template parses, fills every placeholder, carries the caution
// text, and escapes what an operator's name or a token could smuggle in
// (html/template, context-aware escaping: common practice).
func TestPageTemplateFillsAndEscapes(t *testing.T) {
	if pageErr != nil {
		t.Fatal(pageErr)
	}
	var b strings.Builder
	err := pageTemplate.Execute(&b, pageData{CAUTION: webCaution, CSRF: `x" onload="y`, ACTOR: "<script>alert(1)</script>"})
	if err != nil {
		t.Fatal(err)
	}
	html := b.String()
	for _, bad := range []string{"{{", "<script>alert", `x" onload`} {
		if strings.Contains(html, bad) {
			t.Errorf("page contains %q", bad)
		}
	}
	for _, want := range []string{caution.Text, "&lt;script&gt;alert(1)&lt;/script&gt;", `content="x&#34; onload=&#34;y"`} {
		if !strings.Contains(html, want) {
			t.Errorf("page lacks %q", want)
		}
	}
}
