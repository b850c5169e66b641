// Package turntable recovers the geometry of a turntable sequence from a
// reconstruction: the rotation axis (in world and in camera coordinates),
// the camera's elevation above the turntable plane, the angle of every
// frame about the axis, the steps between frames with their spread, a
// comparison with the nominal step and, for sequences that complete a
// turn, the closure error. Refine then constrains the bundle adjustment
// to single-axis motion (one angle per frame).
//
// # The model
//
// A static camera sees a part turning about a fixed axis a (a unit
// vector of the part's frame, the world) by θ_f in frame f. The
// world→camera rotations are then
//
//	R_f = R_c · Rot(a, θ_f),
//
// R_c the camera's orientation at θ = 0, so every relative rotation
// R_0ᵀ·R_f = Rot(a, θ_f − θ_0) turns about the same world axis a, and
// R_f·a = R_c·a is the same camera-frame vector in every view.
// FitReconstruction estimates a, R_c and θ_f from the cameras' rotations
// (FitReconstruction documents the method) and the point where the axis pierces
// the centroid's height from their translations: a world point c on the
// axis does not move, so it has the same camera coordinates in every view
// (T_f + R_f·c constant for perspective cameras, t_f + s_f·(R_f c)_{x,y}
// for affine ones). The fit's misfits (OffAxisRMSDeg,
// AxisTranslationRMS) say whether the sequence is a turntable's.
//
// # Conventions
//
// The axis points up in the image (its camera-frame y component is
// negative, image y running down) and the angles turn right-handed about
// it, so a part turning counter-clockwise seen from above has increasing
// angles. The elevation is positive when the camera looks down onto the
// table: ElevationDeg = asin(−R_f[2]·a), R_f[2] the viewing direction.
// Angles are relative to the first camera and unwrapped (consecutive
// frames differ by less than 180°), in the frames' order.
//
// # Closure
//
// When the frames cover a turn (Closure.Kind): "revisit" — the last frame
// is within half a step of a full turn from the first and the error is
// the span minus 360°; "gap" — one more step would close the turn, and
// the error is the remaining gap minus the expected step (the nominal one
// if given, else the mean).
//
// # Accuracy
//
// On clean synthetic turntables the angles from a bundle adjustment have
// errors of a few thousandths of a degree; for comparison, Fitzgibbon,
// Cross and Zisserman (SMILE 1998, "Automatic 3D model construction for
// turn-table sequences") report about 0.04° standard deviation for the
// turntable angles recovered from a real sequence (quoted from memory).
package turntable
