// Package report writes the HTML report of a trackfactor result: one
// self-contained page (no network, no external scripts, styles or fonts)
// that a person opens in a browser to see at a glance whether a capture
// worked, and why.
//
// The page shows, from the top: the verdict with its reasons; for a failed
// capture the error and what to do; key figures; every warning in plain
// words with what it means and what to do; an interactive 3D view of the
// points and cameras (plain JavaScript on a canvas: drag to rotate, wheel
// to zoom); a few frames with the tracks drawn over them (used, rejected
// as outliers and not used, in distinct shapes and colours, with a
// legend); plots drawn as inline SVG (singular-value spectrum on a log
// scale, residual per point, per frame and per track, track length, and
// the turntable angle per frame when the result has one); and the inputs
// and every setting used.
//
// # Verdict
//
// Judge computes the verdict from the document alone:
//
//   - failed: fewer than 3 cameras or 4 points, a residual that is not a
//     finite number, or a warning whose code says the shape is
//     undetermined (planar-scene, little-rotation, metric-upgrade-failed,
//     too-few-measurements, disconnected-views — see Severe); a capture
//     with no reconstruction at all gets a failure page (WriteFailure);
//   - usable with warnings: any other warning that is not informational
//     (factor.Informational), unknown codes included — a code this build
//     does not know is taken as a reason to look;
//   - good: otherwise.
//
// Informational codes (mirror-ambiguity, incomplete-tracks-dropped,
// outlier-tracks-rejected) are shown but never lower the verdict.
//
// Colours follow Okabe and Ito's colour-blind-safe palette; every meaning
// carried by a colour is carried by a word or a shape too (the verdict
// badge is a circle, a triangle or an octagon; used tracks are dots,
// outliers crosses, unused tracks squares).
package report
