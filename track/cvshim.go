package track

/*
#cgo pkg-config: opencv4
#cgo CPPFLAGS: -I${SRCDIR}
#cgo CXXFLAGS: -std=c++11 -O2
#include "cvshim.h"
*/
import "C"

import (
	"fmt"
	"unsafe"

	"gocv.io/x/gocv"
)

// OpenCV's optical-flow flags (video/tracking.hpp).
const (
	cvOptflowUseInitialFlow   = 4
	cvOptflowLKGetMinEigenval = 8
)

// lkPyramid is one frame's Lucas–Kanade pyramid with its Scharr
// derivatives, built once by OpenCV's buildOpticalFlowPyramid and then
// given to calcOpticalFlowPyrLK for both the forward run (as the next
// frame) and the backward run (as the previous frame). gocv v0.31.0 has
// neither call on pyramids, so a small C++ shim (cvshim.cpp) makes them.
// The pyramid's memory is C++'s and is reused from build to build; close
// frees it.
type lkPyramid struct {
	p      *C.tf_pyramid
	levels int // levels above full resolution of the last build
	win    int // window the borders were made for
	errbuf [256]C.char
}

func newLKPyramid() *lkPyramid {
	return &lkPyramid{p: C.tf_pyramid_new(), levels: -1}
}

func (p *lkPyramid) close() {
	if p.p != nil {
		C.tf_pyramid_free(p.p)
		p.p = nil
	}
}

// build makes the pyramid of gray (CV_8UC1) for windows up to win×win with
// at most maxLevel levels above full resolution, and returns the number of
// levels OpenCV built (the same rule as pyramidLevels).
func (p *lkPyramid) build(gray gocv.Mat, win, maxLevel int) int {
	if gray.Type() != gocv.MatTypeCV8UC1 || gray.Empty() {
		panic(fmt.Sprintf("track: lkPyramid.build needs a non-empty 8-bit grey Mat, got type %v", gray.Type()))
	}
	pix, err := gray.DataPtrUint8()
	if err != nil {
		panic("track: grey Mat has no data: " + err.Error())
	}
	step := C.size_t(gray.Step())
	n := C.tf_pyramid_build(p.p, (*C.uchar)(unsafe.Pointer(&pix[0])), C.int(gray.Rows()), C.int(gray.Cols()), step,
		C.int(win), C.int(maxLevel), &p.errbuf[0], C.int(len(p.errbuf)))
	if n < 0 {
		panic("track: OpenCV buildOpticalFlowPyramid failed: " + C.GoString(&p.errbuf[0]))
	}
	p.levels, p.win = int(n), win
	return p.levels
}

// lkParams are the settings of one pyramidal LK call.
type lkParams struct {
	win      int
	maxLevel int
	maxIter  int
	eps      float64
	minEig   float64
	initial  bool // next holds starting guesses (OPTFLOW_USE_INITIAL_FLOW)
}

// lkPyr runs OpenCV's calcOpticalFlowPyrLK from pyramid prev to pyramid
// next for the points in pts (interleaved x, y; n = len(pts)/2). Results
// go to next (interleaved), status and minEig (one each per point; the
// minimum eigenvalue of the window's gradient matrix is always
// requested, OPTFLOW_LK_GET_MIN_EIGENVALS). OpenCV uses at most the
// pyramids' own levels.
func lkPyr(prev, nxt *lkPyramid, pts, next []float32, status []uint8, minEig []float32, o lkParams) {
	n := len(pts) / 2
	if n == 0 {
		return
	}
	if len(next) < 2*n || len(status) < n || len(minEig) < n {
		panic(fmt.Sprintf("track: lkPyr buffers too small for %d points", n))
	}
	if prev.levels < 0 || nxt.levels < 0 || prev.win < o.win || nxt.win < o.win {
		panic(fmt.Sprintf("track: lkPyr on pyramids not built for a %d px window", o.win))
	}
	flags := cvOptflowLKGetMinEigenval
	if o.initial {
		flags |= cvOptflowUseInitialFlow
	}
	r := C.tf_lk(prev.p, nxt.p, (*C.float)(unsafe.Pointer(&pts[0])), (*C.float)(unsafe.Pointer(&next[0])),
		(*C.uchar)(unsafe.Pointer(&status[0])), (*C.float)(unsafe.Pointer(&minEig[0])), C.int(n),
		C.int(o.win), C.int(o.maxLevel), C.int(o.maxIter), C.double(o.eps), C.int(flags), C.double(o.minEig),
		&prev.errbuf[0], C.int(len(prev.errbuf)))
	if r != 0 {
		panic("track: OpenCV calcOpticalFlowPyrLK failed: " + C.GoString(&prev.errbuf[0]))
	}
}

// cornerMinEigen fills out (Rows·Cols floats) with OpenCV's
// cornerMinEigenVal of gray (CV_8UC1). errbuf receives OpenCV's message
// if it throws (a programmer error: the call then panics).
func cornerMinEigen(gray gocv.Mat, blockSize int, out []float32, errbuf []byte) {
	if gray.Type() != gocv.MatTypeCV8UC1 || gray.Empty() || len(out) < gray.Rows()*gray.Cols() || len(errbuf) == 0 {
		panic("track: cornerMinEigen needs a non-empty 8-bit grey Mat and an output of Rows·Cols floats")
	}
	pix, err := gray.DataPtrUint8()
	if err != nil {
		panic("track: grey Mat has no data: " + err.Error())
	}
	r := C.tf_min_eigen((*C.uchar)(unsafe.Pointer(&pix[0])), C.int(gray.Rows()), C.int(gray.Cols()), C.size_t(gray.Step()),
		C.int(blockSize), (*C.float)(unsafe.Pointer(&out[0])), (*C.char)(unsafe.Pointer(&errbuf[0])), C.int(len(errbuf)))
	if r != 0 {
		panic("track: OpenCV cornerMinEigenVal failed: " + C.GoString((*C.char)(unsafe.Pointer(&errbuf[0]))))
	}
}

// haveVectorKernel says whether refinement uses the AVX2 kernel
// tf_patch_sums (cvshim.cpp) for patches inside the image; it is fixed for
// the process (a property of the CPU) and read-only.
var haveVectorKernel = C.tf_have_vector_kernel() != 0

// patchSumsVector is refPatch.sums through the vector kernel. The caller
// has checked that the padded patch lies inside the image.
func patchSumsVector(im *floatImage, p *refPatch, m *[6]float64, half int, s *patchSums) {
	var out [9]C.double
	C.tf_patch_sums((*C.float)(unsafe.Pointer(&im.pix[0])), C.int(im.w), (*C.float)(unsafe.Pointer(&p.t[0])),
		(*C.float)(unsafe.Pointer(&p.sd[0])), C.int(half), C.int(p.stride),
		(*C.double)(unsafe.Pointer(&m[0])), C.double(p.tm), &out[0])
	s.b = [6]float64{float64(out[0]), float64(out[1]), float64(out[2]), float64(out[3]), float64(out[4]), float64(out[5])}
	s.si, s.sii, s.sit = float64(out[6]), float64(out[7]), float64(out[8])
}

// occlusionVotesVector is refPatch.occlusionVotes through the vector
// kernel tf_occlusion_votes. The caller has checked that both padded
// patches lie inside the image.
func occlusionVotesVector(im *floatImage, p *refPatch, half int, diff float64, buf []float32) {
	vh, off := p.voteHalf, (half-p.voteHalf)*(p.stride+1)
	C.tf_occlusion_votes((*C.float)(unsafe.Pointer(&im.pix[0])), C.int(im.w), (*C.float)(unsafe.Pointer(&p.t[off])),
		C.int(p.stride), C.int(vh), C.int(patchStride(vh)), (*C.double)(unsafe.Pointer(&p.m[0])), C.double(p.vtm),
		C.double(p.vtn2), C.double(p.x0), C.double(p.y0), C.double(diff), (*C.float)(unsafe.Pointer(&buf[0])),
		(*C.ushort)(unsafe.Pointer(&p.votes[0])))
}
