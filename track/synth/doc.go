// Package synth renders a deterministic, seeded synthetic turntable scene
// with exact ground truth: a textured machined part turning about its own
// vertical axis in front of a static camera. It feeds the demo command and
// the tests of the other packages (tracking, factorization, refinement),
// which compare what they recover against Camera, Project, Raycast, Visible
// and Landmarks.
//
// # The part
//
// A stepped shaft with a hexagonal collar, in millimetres, in the part's
// own frame ("world" below): Z along the turntable axis pointing up, the
// origin on the axis at the centre of the part's bottom face.
//
//	lower shaft   radius 12 (Ø24), z ∈ [0, 30]     (LowerShaft* constants)
//	hex collar    40 across flats, z ∈ [30, 40]     (Collar* constants)
//	upper shaft   radius 8 (Ø16),  z ∈ [40, 65]     (UpperShaft* constants)
//
// The collar's flat normals point at azimuths 0°, 60°, …, 300° (flat k is
// the plane n_k·X = 20 with n_k = (cos 60k°, sin 60k°, 0)); its corners lie
// at azimuths 30°+60°k on the circle of radius 40/√3 ≈ 23.09. Each piece is
// a convex solid (two finite cylinders and a hexagonal prism), intersected
// analytically; the nearest entry point along a ray wins. Since every
// piece is convex and the camera is outside all of them, the first hit is
// the entry point of the ray into the piece: t_in = max over the bounding
// surfaces' entry parameters, t_out = min over their exit parameters, a hit
// when t_in ≤ t_out (the slab method for convex solids, common practice).
//
// # Texture and shading
//
// The surface colour is a solid texture fixed to the part: a jittered-grid
// Voronoi pattern (Worley 1996, "A cellular texture basis function"): the
// space is cut into cubes of TextureCellMM, each holding one seed point at
// a hashed random position; a point takes the grey level and slight tint of
// its nearest seed. The cell borders are sharp edges and their junctions
// are corners that a Shi–Tomasi detector finds and a Lucas–Kanade tracker
// follows to sub-pixel accuracy. A little smooth value noise modulates it.
//
// Shading is Lambertian with one directional light fixed relative to the
// camera, plus ambient:
//
//	I = 255·( albedo·(ka + kd·max(0, n·L)) + ks·max(0, r·v)^m )
//
// with r = 2(n·L)n − L (Phong 1975); the specular term is on only with
// Options.Highlight. Because the light is static and the part turns, the
// shading of each surface patch changes from frame to frame, and a
// highlight slides over the surface. There are no cast shadows.
//
// Pixels are the mean of Supersample×Supersample samples on a regular
// grid inside the pixel, so silhouettes and texture edges are anti-aliased
// and their positions are sub-pixel accurate. Optional Gaussian blur is
// applied to the mean image, then optional Gaussian noise (per pixel and
// channel, from a hash of seed, frame and pixel index, so rendering in
// parallel gives identical bytes), then values are rounded to 8 bits.
//
// # The cameras
//
// The turntable turns the part by θ_f (frame f's angle, degrees,
// counter-clockwise seen from above, right-hand rule about +Z): a part
// point X is at Rz(θ_f)·X in the laboratory frame, which coincides with the
// part's frame at θ = 0. The static camera looks at Target(), a point on
// the axis, from elevation e above the turntable plane, along the lab +Y
// direction tilted down. Its lab rotation R_lab has rows
//
//	image x axis  (1, 0, 0)
//	image y axis  (0, −sin e, −cos e)   (down in the image)
//	view axis     (0,  cos e, −sin e)   (= row 1 × row 2)
//
// and the world→camera rotation of frame f is R_f = R_lab·Rz(θ_f), so the
// relative rotation R_j·R_iᵀ = R_lab·Rz(θ_j−θ_i)·R_labᵀ is a rotation by
// θ_j−θ_i about the turntable axis, which in camera coordinates is the
// fixed vector R_lab·(0,0,1). The translation T is the same for all frames.
//
// Pinhole: Xc = R_f·X + T, x = fx·Xc/Zc + cx, y = fy·Yc/Zc + cy, with
// fx = fy = FocalPx, (cx, cy) = ((W−1)/2, (H−1)/2) and the camera centre at
// distance DistanceMM from Target(). Orthographic: x = s·R_f[0]·X + T[0],
// y = s·R_f[1]·X + T[1] with s = PixelsPerMM and T[2] = 0; Target()
// projects to (cx, cy). Pixel coordinates follow the OpenCV convention:
// origin at the centre of the top-left pixel, x right, y down.
//
// By default the scale (orthographic) or distance (pinhole) is chosen so
// that the part, over a full turn, spans 65 % of the image height.
//
// # Backdrop
//
// With Options.Backdrop a textured vertical plane stands BackdropDistanceMM
// behind the axis, fixed in the laboratory, so it is static in the image;
// its texture is a 2D Voronoi pattern with coarser, darker, bluish cells.
// Without it the background is flat dark grey (BackgroundGrey).
//
// # Concurrency
//
// A Scene is immutable after New and safe for concurrent use. Render uses
// GOMAXPROCS goroutines over rows; its output does not depend on their
// number.
package synth
