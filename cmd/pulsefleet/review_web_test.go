package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/chromedp/chromedp"
)

// The review round trip through the page in a real headless Chromium: on
// the device page's episode list the operator opens the review control,
// picks a label, writes a note and saves; the CLI reads the review back
// through the gateway (episodes --format csv), and the audit log holds it.
// Then the review is changed from the page: the CLI's reviews export keeps
// both revisions.
func TestReviewThroughThePageInChromium(t *testing.T) {
	rg := startEpisodeGatewayRG(t, "ward-r-01")
	bctx, do := pageBrowser(t, 1280, 900)
	spo2Low := func(out string) map[string]string {
		t.Helper()
		for _, r := range readEpisodesCSV(t, out) {
			if r["condition"] == "spo2_low" {
				return r
			}
		}
		t.Fatalf("no spo2_low episode in:\n%s", out)
		return nil
	}
	_, out, _ := runCmd("episodes", "--gateway", rg.GRPCAddr, "--format", "csv")
	id := spo2Low(out)["episode_id"]
	row := `#episodes tr[data-episode="` + id + `"]`

	do("device page", chromedp.Navigate("http://"+rg.HTTPAddr+"/device/ward-r-01"), chromedp.WaitVisible(row+` button.review-open`))
	do("review", chromedp.Click(row+` button.review-open`), chromedp.WaitVisible(`#review-dialog`),
		chromedp.Click(`#review-dialog input[value="artefact"]`), chromedp.SendKeys(`#review-note`, "probe slipped off"))
	if dir := os.Getenv("PULSEFLEET_SCREENSHOT_DIR"); dir != "" { // PULSEFLEET_SCREENSHOT_DIR=DIR keeps a picture of the dialog
		png, err := chromedp.Run(bctx, chromedp.FullScreenshot(100))
		if err == nil {
			err = os.WriteFile(filepath.Join(dir, "review-dialog.png"), png, 0o644)
		}
		if err != nil {
			t.Errorf("screenshot: %v", err)
		}
	}
	do("save", chromedp.Click(`#review-save`), chromedp.WaitVisible(row+` .review-label[data-label="artefact"]`))

	_, out, _ = runCmd("episodes", "--gateway", rg.GRPCAddr, "--format", "csv")
	r := spo2Low(out)
	if r["review"] != "artefact" || r["review_note"] != "probe slipped off" || r["reviewer"] != "web@127.0.0.1" || r["review_revision"] != "1" {
		t.Errorf("after the page's review the CLI reads %v, want artefact with the note by web@127.0.0.1, revision 1", r)
	}
	_, out, _ = runCmd("audit", "--gateway", rg.GRPCAddr, "--action", "episode.review")
	if !strings.Contains(out, "web@127.0.0.1") || !strings.Contains(out, "episode "+id+": artefact; note: probe slipped off") {
		t.Errorf("audit after the page's review:\n%s", out)
	}

	// Changed from the page: the newest is shown, the export keeps both.
	do("change", chromedp.Click(row+` button.review-open`), chromedp.WaitVisible(`#review-dialog`),
		chromedp.Click(`#review-dialog input[value="actionable"]`), chromedp.Click(`#review-save`),
		chromedp.WaitVisible(row+` .review-label[data-label="actionable"]`))
	_, out, _ = runCmd("reviews", "--gateway", rg.GRPCAddr)
	if rest := afterCaution(t, "reviews CSV", out); strings.Count(rest, "\n") != 3 || !strings.Contains(rest, ","+id+",1,artefact,") || !strings.Contains(rest, ","+id+",2,actionable,") {
		t.Errorf("reviews export after the change:\n%s\nwant revision 1 artefact and revision 2 actionable of episode %s", out, id)
	}
}
