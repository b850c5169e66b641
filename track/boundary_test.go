package track

import (
	"context"
	"fmt"
	"math"
	"math/rand"
	"testing"

	"trackfactor/track/synth"
)

// twoLayerFrames makes an invented two-layer sequence on a smooth random
// texture (noiseImage, green channel): in frame k the columns x < edge
// show the texture where it was in frame 0 (a static layer), the columns
// x ≥ edge show it moved right by k·v pixels (a moving layer), v an
// integer so that every frame is an exact copy of texture pixels.
func twoLayerFrames(w, h, n, edge, v int) []floatImage {
	tex := noiseImage(w+n*v, h, 7)
	out := make([]floatImage, n)
	for k := range out {
		im := floatImage{w: w, h: h, pix: make([]float32, w*h)}
		for y := 0; y < h; y++ {
			for x := 0; x < w; x++ {
				sx := x
				if x >= edge {
					sx = x - k*v + n*v // the texture is n·v wider: stay inside it
				} else {
					sx = x + n*v
				}
				im.pix[y*w+x] = float32(tex.Pix[tex.PixOffset(sx, y)+1])
			}
		}
		out[k] = im
	}
	return out
}

// TestOcclusionVotes checks the occlusion-boundary votes on the invented
// two-layer sequence of twoLayerFrames (static left of x = 100, moving
// right 1 px per frame from it), with the tracker's default patch (half
// 7, votes on its central 13×13 block) and StaticDiff (2 grey levels):
// the warp of each patch is set to what a tracker would follow (the moving
// layer's motion, or none), as the refinement leaves it. Expected by
// construction:
//   - a patch centred 4 px left of the edge (on the static layer) whose
//     warp follows the moving layer, like a backdrop corner dragged by the
//     part next to it, has a static share above 0.5 (most of its centre
//     is explained by zero motion);
//   - a patch centred 4 px right of the edge (on the moving layer) that
//     follows it has a share below 0.2 (only its left rim is static);
//   - a patch far inside the moving layer that follows it has a share of
//     0 (nothing there is static);
//   - a patch far inside the static layer that does not move has no
//     informative pixel (both hypotheses are the same): ok false.
func TestOcclusionVotes(t *testing.T) {
	const w, h, n, edge, v, half = 200, 120, 6, 100, 1, 7
	frames := twoLayerFrames(w, h, n, edge, v)
	cases := []struct {
		name    string
		x, y    float64
		vx      float64 // the warp's motion per frame
		lo, hi  float64 // expected share in [lo, hi]
		wantAny bool    // some pixel voted
	}{
		{"static corner dragged by the moving layer", edge - 4, 60, v, 0.5, 1, true},
		{"moving corner next to the edge", edge + 4, 60, v, 0, 0.2, true},
		{"moving corner far from the edge", edge + 40, 60, v, 0, 0, true},
		{"static corner far from the edge, not moving", edge - 40, 60, 0, 0, 0, false},
	}
	var buf [(2*maxHalfPatch + 1) * (2*maxHalfPatch + 8)]float32
	for _, c := range cases {
		p, ok := newRefPatch(&frames[0], c.x, c.y, half, nil)
		if !ok {
			t.Fatalf("%s: no reference patch", c.name)
		}
		p.initVotes(half)
		for k := 1; k < n; k++ {
			p.m[2] = c.x + c.vx*float64(k)
			p.occlusionVotes(&frames[k], half, defaultDiff, buf[:])
		}
		s, any := p.staticShare()
		t.Logf("%s: static share %.3f (voted %v)", c.name, s, any)
		if any != c.wantAny {
			t.Errorf("%s: some pixel voted = %v, want %v", c.name, any, c.wantAny)
			continue
		}
		if any && (s < c.lo || s > c.hi) {
			t.Errorf("%s: static share %.3f outside [%g, %g]", c.name, s, c.lo, c.hi)
		}
	}
}

// TestOcclusionKernelMatchesGo: the AVX2 vote kernel (cvshim.cpp) must
// cast the same votes as the plain Go loop, on a real photograph
// (opencv-doc graf1.png) for 1000 random patches (half-sizes 2..10, vote
// blocks of half-size 2..6) under random affine warps near identity and
// random reference positions, over
// three frames (the photograph itself, so that the hypotheses differ only
// by the warp). A vote can differ only where a comparison is within
// float32 rounding of its threshold (the kernel sums the gain in float32
// over 8 lanes): at most 1 in 10⁴ of the votes may differ (none did when
// written).
func TestOcclusionKernelMatchesGo(t *testing.T) {
	if !haveVectorKernel {
		t.Skip("no AVX2/FMA on this CPU; the Go loop is used everywhere")
	}
	im, done := grayFloat(t, extData(t, "graf1.png"))
	defer done()
	rng := rand.New(rand.NewSource(5))
	var buf [(2*maxHalfPatch + 1) * (2*maxHalfPatch + 8)]float32
	total, differ, tested := 0, 0, 0
	for trial := 0; trial < 1000; trial++ {
		h := 2 + rng.Intn(9)
		x := 40 + rng.Float64()*float64(im.w-80)
		y := 40 + rng.Float64()*float64(im.h-80)
		a, ok := newRefPatch(im, x, y, h, nil)
		if !ok {
			continue
		}
		a.initVotes(h)
		b := *a
		b.initVotes(h)
		for k := 0; k < 3; k++ {
			th := (rng.Float64() - 0.5) * 0.1
			sc := 1 + (rng.Float64()-0.5)*0.1
			m := [6]float64{sc * math.Cos(th), -sc * math.Sin(th), x + rng.Float64()*6 - 3,
				sc * math.Sin(th), sc * math.Cos(th), y + rng.Float64()*6 - 3}
			a.m, b.m = m, m
			a.occlusionVotesScalar(im, h, defaultDiff, buf[:], true, true)
			occlusionVotesVector(im, &b, h, defaultDiff, buf[:])
		}
		for k := range a.votes {
			total += int(a.votes[k])
			if a.votes[k] != b.votes[k] {
				differ++
			}
		}
		tested++
	}
	t.Logf("%d patches, %d votes, %d counts differ", tested, total, differ)
	if tested < 800 || total < 10000 {
		t.Fatalf("only %d patches and %d votes", tested, total)
	}
	if float64(differ) > 1e-4*float64(total) {
		t.Errorf("%d of %d vote counts differ between the kernel and the Go loop", differ, total)
	}
}

// TestRunDeterministicAcrossWorkers: the project's determinism rule
// (byte-identical results across runs and thread counts) for the tracker:
// on the synthetic turntable with its backdrop (8 frames, noise σ = 1;
// the occlusion votes, the refinement pool and the frame reader all
// take part) Run with one refinement worker and decoding in line, and with
// three workers and decoding ahead, must give the same tracks, positions
// and counts.
func TestRunDeterministicAcrossWorkers(t *testing.T) {
	_, src, _ := renderScene(t, synth.Options{Frames: 8, NoiseSigma: 1, Backdrop: true})
	run := func(o Options) string {
		set, err := Run(context.Background(), src, o, nil)
		if err != nil {
			t.Fatal(err)
		}
		checkInvariants(t, set)
		if len(set.Tracks) < 100 || set.Stats.Refined == 0 {
			t.Fatalf("%d tracks, %d refined points: nothing to compare", len(set.Tracks), set.Stats.Refined)
		}
		return fmt.Sprintf("%+v|%v|%v|%d|%d", set.Tracks, set.Stats.Ended, set.Stats.DroppedObs, set.Stats.Refined, set.Stats.RefineIters)
	}
	a := run(Options{Prefetch: -1, Refine: RefineOptions{Workers: 1}})
	b := run(Options{Refine: RefineOptions{Workers: 3}})
	if a != b {
		t.Errorf("results differ between 1 and 3 refinement workers (%d and %d bytes of description)", len(a), len(b))
	}
}
