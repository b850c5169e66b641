// Package track turns a sequence of frames into 2D feature tracks: it reads
// frames, detects corners, follows them with pyramidal Lucas–Kanade,
// checks and refines every position, removes static background and
// outliers, and reads and writes track files. It never sees a camera model;
// package factor takes the resulting Set.
//
// # Data flow
//
//	Source (OpenFolder | OpenVideo | Open | FromImages)
//	   │ 8-bit BGR frames, decoded ahead in a goroutine that also builds
//	   │ each frame's LK pyramid once and its smoothed float image
//	   ▼
//	Run: Detect (Shi–Tomasi + cornerSubPix) in frame 0
//	   │ per frame pair: LK forward (with motion prediction, pyramid depth
//	   │ chosen from the residual motion, deep retry), LK backward,
//	   │ border / eigenvalue / forward–backward checks, drift-free
//	   │ refinement against each track's first-frame patch (affine +
//	   │ gain/bias, inverse compositional), appearance and motion checks,
//	   │ occlusion votes (static layer or the track's motion, per patch
//	   │ pixel), re-detection in empty areas
//	   ▼
//	Reject: static background, affine-epipolar outliers (RANSAC)
//	   ▼
//	occlusion-boundary check: tracks whose patch centre is static layer
//	   ▼
//	Set (tracks, frame names, size, Stats) ──► WriteCSV / ReadCSV
//
// # Conventions
//
// Pixel coordinates as in the OpenCV library: origin at the centre of the
// top-left pixel, x to the right, y down, pixel centres at integer
// coordinates. Frames are numbered 0.. in the order of the sorted input
// (natural numeric order of file names: "2.png" before "10.png"), after
// the Range is applied. Track ids are assigned in order of detection and
// never reused; tracks dropped as too short leave gaps.
//
// # Diagnostics
//
// Every track that ends is counted once in Stats.Ended under the reason it
// ended (the Drop* constants); tracks ending with fewer than MinLength
// observations are counted as DropTooShort and are not in the Set. So
// Stats.Detected = Stats.Alive + Σ Stats.Ended. Options the tracker had to
// change to run (window, pyramid levels, patch size on small frames) are
// listed in Stats.Clamped. OpenCV's calcOpticalFlowPyrLK reports all its
// failures as one status; Run tells them apart (left the image, low
// eigenvalue, not found). Stats.DroppedObs counts the dropped observations
// by the same reasons.
//
// # Options
//
// Every stage takes an Options struct whose zero value means the documented
// defaults; booleans are phrased so that false is the default (Refine.Off,
// NoPredict, Reject.NoStatic, …). Validate reports the first bad field in a
// one-line error. Programmer errors (a nil Source, a frame index out of
// range) panic with a "track: " message; bad input is a returned error.
//
// # Resources
//
// gocv Mats hold C memory: Sources own the Mats they return only until the
// next Read into the same Mat; Run closes everything it allocates. Run uses
// OpenCV's own threads inside LK, one goroutine decoding ahead, and a fixed
// pool of goroutines for refinement (RefineOptions.Workers, started once
// per Run); a Source is used from one goroutine at a time.
//
// # OpenCV shim
//
// gocv v0.31.0 lacks buildOpticalFlowPyramid, calcOpticalFlowPyrLK on
// pyramids and cornerMinEigenVal; cvshim.cpp (cgo, pkg-config opencv4, the
// OpenCV gocv links) provides them, and an AVX2 kernel for the
// refinement's per-pixel sums, used when the CPU has AVX2 and FMA (the
// plain Go loop otherwise; TestVectorKernelMatchesGo checks they agree).
package track
