package track

import (
	"context"
	"math"
	"path/filepath"
	"testing"

	"gocv.io/x/gocv"

	"trackfactor/track/synth"
)

// TestVideoSource writes synth frames into an MJPG .avi with OpenCV's
// VideoWriter and reads them back: frame count, size, frame names, the
// range, seeking back, and the content (MJPEG is lossy: mean absolute
// difference below 8 grey levels, a loose bound for quality-95 JPEG on
// this texture, from memory).
func TestVideoSource(t *testing.T) {
	const w, h, n = 160, 120, 8
	sc, err := synth.New(synth.Options{Width: w, Height: h, Frames: n, StepDeg: 3})
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "clip.avi")
	vw, err := gocv.VideoWriterFile(path, "MJPG", 10, w, h, true)
	if err != nil {
		t.Fatalf("VideoWriter: %v", err)
	}
	var frames []gocv.Mat
	for f := 0; f < n; f++ {
		im, err := sc.Render(context.Background(), f)
		if err != nil {
			t.Fatal(err)
		}
		m := gocv.NewMat()
		imageToBGR(im, &m)
		if err := vw.Write(m); err != nil {
			t.Fatal(err)
		}
		frames = append(frames, m)
	}
	vw.Close()
	defer func() {
		for i := range frames {
			frames[i].Close()
		}
	}()

	src, err := Open(path, Range{})
	if err != nil {
		t.Fatal(err)
	}
	defer src.Close()
	if src.Len() != n {
		t.Errorf("%d frames read back, want %d", src.Len(), n)
	}
	if gw, gh := src.Size(); gw != w || gh != h {
		t.Errorf("size %dx%d, want %dx%d", gw, gh, w, h)
	}
	if src.Name(3) != "frame-000003" {
		t.Errorf("name %q, want frame-000003", src.Name(3))
	}
	m := gocv.NewMat()
	defer m.Close()
	for _, i := range []int{0, 1, 5, 2} { // 2 after 5: seeks back
		if err := src.Read(context.Background(), i, &m); err != nil {
			t.Fatal(err)
		}
		if d := meanAbsDiff(m, frames[i]); d > 8 {
			t.Errorf("frame %d differs from what was written by %.1f grey levels on average", i, d)
		}
		if i != 0 {
			if d := meanAbsDiff(m, frames[0]); d < 1 {
				t.Errorf("frame %d looks like frame 0 (difference %.2f): reading does not advance", i, d)
			}
		}
	}
	sub, err := OpenVideo(path, Range{Start: 1, Step: 3})
	if err != nil {
		t.Fatal(err)
	}
	defer sub.Close()
	if sub.Len() != 3 || sub.Name(1) != "frame-000004" {
		t.Fatalf("range 1::3 of 8 gave %d frames, second %q; want 3, frame-000004", sub.Len(), sub.Name(1))
	}
	if err := sub.Read(context.Background(), 2, &m); err != nil {
		t.Fatal(err)
	}
	if d := meanAbsDiff(m, frames[7]); d > 8 {
		t.Errorf("range frame 2 (video frame 7) differs by %.1f", d)
	}
	if _, err := OpenVideo(path, Range{Start: 6}); err == nil {
		t.Errorf("a range leaving 2 frames was accepted")
	}
}

func meanAbsDiff(a, b gocv.Mat) float64 {
	pa, _ := a.DataPtrUint8()
	pb, _ := b.DataPtrUint8()
	var s float64
	for i := range pa {
		s += math.Abs(float64(pa[i]) - float64(pb[i]))
	}
	return s / float64(len(pa))
}
