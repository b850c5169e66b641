package report_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"image"
	"image/png"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/cdproto/cdp"
	"github.com/chromedp/cdproto/input"
	cdplog "github.com/chromedp/cdproto/log"
	"github.com/chromedp/cdproto/network"
	"github.com/chromedp/cdproto/runtime"
	"github.com/chromedp/chromedp"

	"trackfactor/pipeline"
	"trackfactor/report"
	"trackfactor/track/synth"
)

// The browser test: headless Chromium (Debian's package, installed by
// scripts/test.sh) opens reports made by a real pipeline run and checks,
// through the DevTools protocol, that the page loads without script errors,
// fetches nothing from outside, and that the 3D view draws the points and
// answers a drag and the wheel. It saves screenshots for a person to look
// at: TF_REPORT_SCREENSHOT names the file of the good capture's report
// (default: the test's temporary folder); the failed capture's report goes
// beside it with "-failed" before the extension.

// viewBackground is the 3D view's background colour (BACKGROUND in
// assets/view3d.js).
var viewBackground = [3]int{0x1d, 0x23, 0x2b}

func chromiumPath(t *testing.T) string {
	if testing.Short() {
		t.Skip("browser test: runs in the full suite only (go test without -short, or scripts/test.sh)")
	}
	for _, name := range []string{"chromium", "chromium-browser", "google-chrome"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	t.Fatal("browser test: no chromium on PATH; install Debian's chromium (scripts/test.sh does: TF_SETUP_EXTRA=chromium bash scripts/setup.sh)")
	return ""
}

// browser starts headless Chromium with an empty profile and the flags
// that keep it from reaching out to the network.
func browser(t *testing.T, path string) context.Context {
	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(path),
		chromedp.Flag("headless", true),
		chromedp.Flag("no-sandbox", true),
		chromedp.Flag("disable-gpu", true),
		chromedp.Flag("disable-quic", true),
		chromedp.Flag("no-first-run", true),
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.Flag("hide-scrollbars", true),
		chromedp.UserDataDir(t.TempDir()),
		chromedp.WindowSize(1280, 1000),
	}
	actx, cancelA := chromedp.NewExecAllocator(context.Background(), opts...)
	ctx, cancelB := chromedp.NewContext(actx)
	t.Cleanup(func() { cancelB(); cancelA() })
	if err := chromedp.Do(ctx); err != nil { // start the browser and open a tab
		t.Fatalf("browser test: chromium does not start: %v", err)
	}
	return ctx
}

// pageLog collects what a page reports: script errors (uncaught
// exceptions, console.error, error entries of the browser log) and every
// URL it requests.
type pageLog struct {
	mu       sync.Mutex
	errors   []string
	requests []string
}

func listen(t *testing.T, ctx context.Context) *pageLog {
	pl := &pageLog{}
	err := chromedp.Listen(ctx, func(ev any) {
		pl.mu.Lock()
		defer pl.mu.Unlock()
		switch e := ev.(type) {
		case *runtime.EventExceptionThrown:
			d := e.ExceptionDetails
			msg := d.Text
			if d.Exception != nil {
				msg += " " + d.Exception.Description
			}
			pl.errors = append(pl.errors, fmt.Sprintf("exception: %s (line %d)", msg, d.LineNumber))
		case *runtime.EventConsoleAPICalled:
			if e.Type == runtime.ConsoleAPICalledTypeError || e.Type == runtime.ConsoleAPICalledTypeAssert {
				var parts []string
				for _, a := range e.Args {
					parts = append(parts, string(a.Value)+a.Description)
				}
				pl.errors = append(pl.errors, "console.error: "+strings.Join(parts, " "))
			}
		case *cdplog.EventEntryAdded:
			if e.Entry.Level == cdplog.EntryLevelError {
				pl.errors = append(pl.errors, "log: "+e.Entry.Text+" "+e.Entry.URL)
			}
		case *network.EventRequestWillBeSent:
			pl.requests = append(pl.requests, e.Request.URL)
		}
	})
	if err != nil {
		t.Fatal(err)
	}
	enable := chromedp.Func(func(ctx context.Context, tg *chromedp.Target) error {
		if _, err := cdp.Call(ctx, tg, network.Enable, network.EnableParams{}); err != nil {
			return err
		}
		if _, err := cdp.Call(ctx, tg, cdplog.Enable, cdp.Empty{}); err != nil {
			return err
		}
		_, err := cdp.Call(ctx, tg, runtime.Enable, cdp.Empty{})
		return err
	})
	if err := chromedp.Do(ctx, enable); err != nil {
		t.Fatal(err)
	}
	return pl
}

func (pl *pageLog) snapshot() (errs, reqs []string) {
	pl.mu.Lock()
	defer pl.mu.Unlock()
	return append([]string(nil), pl.errors...), append([]string(nil), pl.requests...)
}

// open loads a file and waits until the page has drawn.
func open(t *testing.T, ctx context.Context, path string) {
	abs, err := filepath.Abs(path)
	if err != nil {
		t.Fatal(err)
	}
	tctx, cancel := context.WithTimeout(ctx, 60*time.Second)
	defer cancel()
	if err := chromedp.Do(tctx, chromedp.Navigate("file://"+abs), chromedp.WaitReady(chromedp.CSS("body"))); err != nil {
		t.Fatalf("loading %s: %v", path, err)
	}
	// Two animation frames: the view draws on the first one after load.
	wait := `new Promise(r => requestAnimationFrame(() => requestAnimationFrame(() => r(true))))`
	if _, err := chromedp.Run(tctx, chromedp.Evaluate[bool](wait, chromedp.EvalAwaitPromise)); err != nil {
		t.Fatal(err)
	}
}

// nonBackground counts the pixels of a PNG that differ clearly from the
// view's background colour.
func nonBackground(t *testing.T, pngData []byte) (n, total int, im image.Image) {
	im, err := png.Decode(bytes.NewReader(pngData))
	if err != nil {
		t.Fatalf("screenshot is not a PNG: %v", err)
	}
	b := im.Bounds()
	for y := b.Min.Y; y < b.Max.Y; y++ {
		for x := b.Min.X; x < b.Max.X; x++ {
			r, g, bl, _ := im.At(x, y).RGBA()
			d := abs(int(r>>8)-viewBackground[0]) + abs(int(g>>8)-viewBackground[1]) + abs(int(bl>>8)-viewBackground[2])
			if d > 40 {
				n++
			}
			total++
		}
	}
	return n, total, im
}

func abs(v int) int {
	if v < 0 {
		return -v
	}
	return v
}

func differing(a, b image.Image) int {
	if a.Bounds() != b.Bounds() {
		return a.Bounds().Dx() * a.Bounds().Dy()
	}
	n := 0
	bb := a.Bounds()
	for y := bb.Min.Y; y < bb.Max.Y; y++ {
		for x := bb.Min.X; x < bb.Max.X; x++ {
			r1, g1, b1, _ := a.At(x, y).RGBA()
			r2, g2, b2, _ := b.At(x, y).RGBA()
			if r1 != r2 || g1 != g2 || b1 != b2 {
				n++
			}
		}
	}
	return n
}

func screenshotPath(t *testing.T, suffix string) string {
	p := os.Getenv("TF_REPORT_SCREENSHOT")
	if p == "" {
		p = filepath.Join(t.TempDir(), "report.png")
	}
	if suffix != "" {
		ext := filepath.Ext(p)
		p = strings.TrimSuffix(p, ext) + suffix + ext
	}
	if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
		t.Fatal(err)
	}
	return p
}

// realRun reconstructs a small rendered turntable scene with the whole
// pipeline and returns the folder with its report.
func realRun(t *testing.T) string {
	scene, err := synth.New(synth.Options{Frames: 16, StepDeg: 1.2, NoiseSigma: 1, Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	frames := filepath.Join(t.TempDir(), "part5")
	if err := os.MkdirAll(frames, 0o755); err != nil {
		t.Fatal(err)
	}
	if _, err := scene.WriteFrames(context.Background(), frames, nil); err != nil {
		t.Fatal(err)
	}
	out := filepath.Join(t.TempDir(), "out")
	if _, err := pipeline.Run(context.Background(), pipeline.Config{Input: frames, Out: out}); err != nil {
		t.Fatal(err)
	}
	return out
}

func TestReportInBrowser(t *testing.T) {
	chrome := chromiumPath(t)
	out := realRun(t)
	ctx := browser(t, chrome)
	pl := listen(t, ctx)

	// The collector must see an error when there is one, or the checks
	// below could not fail.
	probe := filepath.Join(t.TempDir(), "probe.html")
	os.WriteFile(probe, []byte(`<!DOCTYPE html><title>probe</title><script>console.error("probe-error"); undefinedFunction();</script>`), 0o644)
	open(t, ctx, probe)
	time.Sleep(200 * time.Millisecond)
	if errs, _ := pl.snapshot(); len(errs) < 2 {
		t.Fatalf("the error collector missed the probe page's errors (got %q)", errs)
	}
	pl.mu.Lock()
	pl.errors, pl.requests = nil, nil
	pl.mu.Unlock()

	page := filepath.Join(out, "report.html")
	open(t, ctx, page)

	// Structure as the browser parsed it.
	verdict, err := chromedp.Run(ctx, chromedp.Evaluate[string](`document.getElementById("verdict").dataset.verdict`))
	if err != nil {
		t.Fatal(err)
	}
	if verdict != string(report.Good) && verdict != string(report.Warnings) {
		t.Errorf("verdict %q for a clean rendered scene", verdict)
	}
	counts, err := chromedp.Run(ctx, chromedp.Evaluate[map[string]int](`({
		sections: document.querySelectorAll("main > section").length,
		plots: document.querySelectorAll("#plots svg.plot").length,
		frames: document.querySelectorAll("#frames svg.frame").length,
		frameImages: [...document.querySelectorAll("#frames svg.frame image")].filter(i => i.getBBox().width > 0).length,
	})`))
	if err != nil {
		t.Fatal(err)
	}
	if counts["sections"] < 7 || counts["plots"] != 6 || counts["frames"] != 3 || counts["frameImages"] != 3 {
		t.Errorf("page structure %v: want ≥ 7 sections, 6 plots, 3 frames with their images", counts)
	}

	// The 3D view draws the cloud.
	shot1, err := chromedp.Run(ctx, chromedp.Screenshot(chromedp.ID("view3d")))
	if err != nil {
		t.Fatal(err)
	}
	n, total, im1 := nonBackground(t, shot1)
	t.Logf("3D view: %d of %d pixels are not background", n, total)
	if n < 300 {
		t.Errorf("the 3D view draws %d non-background pixels of %d; want the points and cameras (≥ 300)", n, total)
	}

	// A drag rotates it, the wheel zooms it.
	if err := chromedp.Do(ctx, chromedp.Evaluate[chromedp.Void](`document.getElementById("view3d").scrollIntoView({block: "center"})`)); err != nil {
		t.Fatal(err)
	}
	box, err := chromedp.Run(ctx, chromedp.Evaluate[map[string]float64](`(() => { const r = document.getElementById("view3d").getBoundingClientRect(); return {x: r.x, y: r.y, w: r.width, h: r.height}; })()`))
	if err != nil {
		t.Fatal(err)
	}
	cx, cy := box["x"]+box["w"]/2, box["y"]+box["h"]/2
	err = chromedp.Do(ctx,
		chromedp.MouseEvent(chromedp.MousePressed, cx, cy, chromedp.ButtonLeft),
		chromedp.MouseEvent(chromedp.MouseMoved, cx+60, cy+10, chromedp.ButtonLeft),
		chromedp.MouseEvent(chromedp.MouseMoved, cx+140, cy+20, chromedp.ButtonLeft),
		chromedp.MouseEvent(chromedp.MouseReleased, cx+140, cy+20, chromedp.ButtonLeft),
	)
	if err != nil {
		t.Fatal(err)
	}
	open2 := `new Promise(r => requestAnimationFrame(() => requestAnimationFrame(() => r(true))))`
	chromedp.Run(ctx, chromedp.Evaluate[bool](open2, chromedp.EvalAwaitPromise))
	shot2, err := chromedp.Run(ctx, chromedp.Screenshot(chromedp.ID("view3d")))
	if err != nil {
		t.Fatal(err)
	}
	_, _, im2 := nonBackground(t, shot2)
	if d := differing(im1, im2); d < total/200 {
		t.Errorf("a drag changed %d of %d pixels of the 3D view; it should rotate it", d, total)
	}
	if err := chromedp.Do(ctx, chromedp.MouseEvent(chromedp.MouseWheel, cx, cy, func(p *input.DispatchMouseEventParams) {
		p.DeltaX, p.DeltaY = 0.001, -600 // the protocol needs both deltas and leaves zeros out
	})); err != nil {
		t.Fatal(err)
	}
	chromedp.Run(ctx, chromedp.Evaluate[bool](open2, chromedp.EvalAwaitPromise))
	shot3, err := chromedp.Run(ctx, chromedp.Screenshot(chromedp.ID("view3d")))
	if err != nil {
		t.Fatal(err)
	}
	n3, _, im3 := nonBackground(t, shot3)
	if d := differing(im2, im3); d < total/200 || n3 <= n/2 {
		t.Errorf("the wheel changed %d pixels (non-background %d → %d); it should zoom in", d, n, n3)
	}
	// Back to the start view for the screenshot.
	chromedp.Do(ctx, chromedp.Evaluate[chromedp.Void](`document.getElementById("view-reset").click(); window.scrollTo(0, 0)`))
	chromedp.Run(ctx, chromedp.Evaluate[bool](open2, chromedp.EvalAwaitPromise))

	full, err := chromedp.Run(ctx, chromedp.FullScreenshot(100))
	if err != nil {
		t.Fatal(err)
	}
	sp := screenshotPath(t, "")
	if err := os.WriteFile(sp, full, 0o644); err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshot of the report: %s", sp)

	// A failed capture's report, too.
	fail := filepath.Join(t.TempDir(), "failed.html")
	var fb bytes.Buffer
	report.WriteFailure(&fb, report.FailureInfo{Name: "captures/broken", Input: "captures/broken", Kind: report.FailInput,
		Err: errors.New("track: folder captures/broken gives 2 frames; at least 3 are needed")})
	os.WriteFile(fail, fb.Bytes(), 0o644)
	open(t, ctx, fail)
	fv, err := chromedp.Run(ctx, chromedp.Evaluate[string](`document.getElementById("verdict").dataset.verdict + " | " + document.getElementById("failure").innerText`))
	if err != nil {
		t.Fatal(err)
	}
	if !strings.HasPrefix(fv, "failed | ") || !strings.Contains(fv, "at least 3 are needed") {
		t.Errorf("the failure report reads %q", fv)
	}
	full, err = chromedp.Run(ctx, chromedp.FullScreenshot(100))
	if err != nil {
		t.Fatal(err)
	}
	sp = screenshotPath(t, "-failed")
	os.WriteFile(sp, full, 0o644)
	t.Logf("screenshot of the failure report: %s", sp)

	errs, reqs := pl.snapshot()
	for _, e := range errs {
		t.Errorf("script error: %s", e)
	}
	for _, u := range reqs {
		if !strings.HasPrefix(u, "file://") && !strings.HasPrefix(u, "data:") {
			t.Errorf("the page fetched %s; a report must be self-contained", u)
		}
	}
	if len(reqs) == 0 {
		t.Error("no request seen at all: the network listener is not working")
	}
}
