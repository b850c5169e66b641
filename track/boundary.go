package track

import "math"

// The occlusion-boundary check (RefineOptions.StaticShare).
//
// A corner next to the outline of a moving object seen against a static
// background has a window that holds two motions: the object's and zero.
// Lucas–Kanade and the affine refinement fit one motion to the whole window,
// so the track follows a blend of the two, usually dominated by the
// object's texture. When the corner itself belongs to the background (a
// backdrop corner a few pixels outside the outline, or a T-junction that
// the outline forms with a backdrop edge) the track is not the image of one
// 3D point: it slides with the occluding contour. Such a track passes the
// frame-pair checks: it moves along the epipolar lines (the contour slides
// over the surface in the viewing direction), so the affine-epipolar
// RANSAC of Reject keeps it, and part of its window moves, so the static
// check keeps it too. Shi and Tomasi ("Good features to track", CVPR 1994,
// from memory) name such features at depth discontinuities as the ones a
// tracker must reject; T-junctions at occluding contours as a source of
// false corners are common knowledge of the trade.
//
// The check is a two-layer motion segmentation of the reference patch
// (its central block of half-size maxVoteHalf, where the weights below
// are not negligible) in
// the sense of layered motion (Wang & Adelson, "Representing moving images
// with layers", IEEE Trans. Image Processing 3(5), 1994): two motion
// hypotheses, the static layer (zero motion: the current frame at the
// track's reference position) and the track's own motion (the current
// frame through the refined affine warp, with a least-squares gain and
// bias fitted over the block), and each pixel is assigned to the hypothesis that explains it
// better, here by a vote per frame. Pixels where the two hypotheses
// predict nearly the same value (flat regions, or too little motion yet)
// carry no evidence and do not vote. The track's point is the patch
// centre, so the track is removed when, weighted by a Gaussian of
// occlusionSigma around the centre, more than StaticShare of the pixels
// that voted belong to the static layer. The votes are summed over the
// track's whole life, so slow drifts that no single frame pair shows
// accumulate evidence.

// maxVoteHalf is the half-size of the central block of the patch that
// votes: 3·occlusionSigma, beyond which the Gaussian weight is below
// 1.2 %.
const maxVoteHalf = 6

// initVotes makes room for occlusion votes on the central block of the
// patch (half-size min(half, maxVoteHalf)) and fixes that block's template
// mean and squared norm for the gain fit.
func (p *refPatch) initVotes(half int) {
	vh := min(half, maxVoteHalf)
	n, vs := 2*vh+1, patchStride(vh)
	p.voteHalf = vh
	p.votes = make([]uint16, 2*n*vs)
	off := half - vh
	var s, ss float64
	for j := 0; j < n; j++ {
		for i := 0; i < n; i++ {
			v := float64(p.t[(off+j)*p.stride+off+i])
			s += v
			ss += v * v
		}
	}
	p.vtm = s / float64(n*n)
	p.vtn2 = math.Max(0, ss-s*p.vtm)
}

// occlusionVotes adds this frame's votes (see the comment above) for the
// central block of the patch warped by p.m into im. half is the patch
// half-size, diff the smallest informative difference in grey levels
// (RefineOptions.StaticDiff), buf scratch of at least
// (2·maxVoteHalf+1)·patchStride(maxVoteHalf) floats. The votes are two
// planes of (2·p.voteHalf+1) rows of patchStride(p.voteHalf) counts:
// informative frames, then static votes.
func (p *refPatch) occlusionVotes(im *floatImage, half int, diff float64, buf []float32) {
	vh := p.voteHalf
	n, vs := 2*vh+1, patchStride(vh)
	if p.votes == nil || len(buf) < n*vs {
		return
	}
	hf := float64(vh)
	m := &p.m
	in := func(u, v float64) bool {
		x := m[0]*u + m[1]*v + m[2]
		y := m[3]*u + m[4]*v + m[5]
		return x >= 0 && y >= 0 && x < float64(im.w-1) && y < float64(im.h-1)
	}
	inside := in(-hf, -hf) && in(hf, -hf) && in(-hf, hf) && in(hf, hf)
	zx, zy := p.x0-hf, p.y0-hf
	zin := zx >= 0 && zy >= 0 && zx+float64(vs) < float64(im.w-1) && zy+float64(n) < float64(im.h-1)
	if inside && zin && haveVectorKernel {
		// The kernel also reads the padding lanes of each row.
		if r := float64(vs - 1 - vh); in(r, -hf) && in(r, hf) {
			occlusionVotesVector(im, p, half, diff, buf)
			return
		}
	}
	p.occlusionVotesScalar(im, half, diff, buf, inside, zin)
}

// occlusionVotesScalar is occlusionVotes in plain Go; inside and zin say
// that the warped and the static block lie inside the image with a pixel
// to spare (no clamping needed).
func (p *refPatch) occlusionVotesScalar(im *floatImage, half int, diff float64, buf []float32, inside, zin bool) {
	vh := p.voteHalf
	n, vs := 2*vh+1, patchStride(vh)
	plane := n * vs
	off := half - vh
	st := p.stride
	hf := float64(vh)
	m := &p.m
	tk := func(j, i int) float32 { return p.t[(off+j)*st+off+i] }
	iw := buf[:plane]
	// The track's hypothesis: the frame through the warp, and the
	// least-squares gain and bias of I(W(u)) ≈ g·(T(u) − mean T) + mean I.
	var si, sit float64
	for j := 0; j < n; j++ {
		v := float64(j) - hf
		X := -hf*m[0] + m[1]*v + m[2]
		Y := -hf*m[3] + m[4]*v + m[5]
		for i := 0; i < n; i++ {
			var val float64
			if inside {
				val = im.bilinear(X, Y)
			} else {
				val = im.at(X, Y)
			}
			iw[j*vs+i] = float32(val)
			si += val
			sit += val * (float64(tk(j, i)) - p.vtm)
			X += m[0]
			Y += m[3]
		}
	}
	g := 0.0
	if p.vtn2 > 0 {
		g = sit / p.vtn2
	}
	mi := si / float64(n*n)
	// The static hypothesis: the frame at the reference position, the
	// same sub-pixel offset for every pixel.
	zx, zy := p.x0-hf, p.y0-hf
	ix, iy := int(math.Floor(zx)), int(math.Floor(zy))
	fx, fy := float32(zx-float64(ix)), float32(zy-float64(iy))
	d := float32(diff)
	for j := 0; j < n; j++ {
		for i := 0; i < n; i++ {
			var z float32
			if zin {
				o := (iy+j)*im.w + ix + i
				q := im.pix[o : o+im.w+2 : o+im.w+2]
				top := q[0] + fx*(q[1]-q[0])
				bot := q[im.w] + fx*(q[im.w+1]-q[im.w])
				z = top + fy*(bot-top)
			} else {
				z = float32(im.at(p.x0+float64(i-vh), p.y0+float64(j-vh)))
			}
			k := j*vs + i
			w := iw[k]
			if w-z < d && z-w < d {
				continue // the hypotheses agree here: no evidence
			}
			t := tk(j, i)
			em := float64(w) - mi - g*(float64(t)-p.vtm)
			ez := float64(z - t)
			if p.votes[k] < math.MaxUint16 {
				p.votes[k]++
			}
			if math.Abs(ez) < math.Abs(em) && p.votes[plane+k] < math.MaxUint16 {
				p.votes[plane+k]++
			}
		}
	}
}

// staticShare is the Gaussian-weighted (σ = occlusionSigma, about the
// patch centre) share of the voting pixels whose votes were mostly
// static; ok is false when no pixel voted.
func (p *refPatch) staticShare() (share float64, ok bool) {
	vh := p.voteHalf
	n, vs := 2*vh+1, patchStride(vh)
	plane := n * vs
	if p.votes == nil {
		return 0, false
	}
	var all, static float64
	c := -1 / (2 * occlusionSigma * occlusionSigma)
	for j := 0; j < n; j++ {
		v := float64(j - vh)
		for i := 0; i < n; i++ {
			k := j*vs + i
			inf, sv := p.votes[k], p.votes[plane+k]
			if inf == 0 {
				continue
			}
			u := float64(i - vh)
			w := math.Exp(c * (u*u + v*v))
			all += w
			if 2*int(sv) > int(inf) {
				static += w
			}
		}
	}
	if all == 0 {
		return 0, false
	}
	return static / all, true
}

// bilinear samples the image at (x, y), which must lie inside with a pixel
// to spare (no clamping).
func (im *floatImage) bilinear(x, y float64) float64 {
	x0, y0 := int(x), int(y)
	fx, fy := x-float64(x0), y-float64(y0)
	o := y0*im.w + x0
	q := im.pix[o : o+im.w+2 : o+im.w+2]
	q00, q01 := float64(q[0]), float64(q[1])
	q10, q11 := float64(q[im.w]), float64(q[im.w+1])
	top := q00 + fx*(q01-q00)
	bot := q10 + fx*(q11-q10)
	return top + fy*(bot-top)
}
