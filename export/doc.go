// Package export writes trackfactor's results and reads them back.
//
// It owns the output contract of a run folder:
//
//	reconstruction.json  Document, schema "trackfactor/reconstruction@1"
//	points.ply           the sparse point cloud (WritePointsPLY)
//	cameras.ply          the cameras drawn as axis triads (WriteCamerasPLY)
//	tracks.csv           track,frame,x,y — one row per observation used (WriteTracksCSV)
//
// # reconstruction.json
//
// A Document mirrors the file field for field; NewDocument builds one from a
// factor.Reconstruction. WriteJSON is deterministic: the same Document gives
// the same bytes (fields in declaration order, settings keys sorted, numbers
// in the shortest form that reads back to the same float64). JSON has no
// NaN or infinity, so WriteJSON refuses them and names the field with a JSON
// pointer (RFC 6901), for example /cameras/3/rotation/1/2. The two ratio
// diagnostics that are legitimately undefined (rank_gap when σ4 = 0,
// noise_sigma_px without redundant measurements) are written as null.
//
// Validate checks a file against the JSON Schema (draft 2020-12) embedded in
// the package; the same file lives in the repository's schema folder.
// ReadJSON refuses a schema string it does not know, validates, and decodes.
//
// # PLY
//
// The writers follow the PLY format as described by Greg Turk (1994):
// binary_little_endian 1.0 by default, ascii 1.0 on request, comment lines
// naming the producer and the unit ("comment units mm"). ReadPLY reads
// ascii, binary_little_endian and binary_big_endian files with any elements
// and scalar or list properties, checking every count and bound; it never
// panics on damaged input.
//
// # Staged output
//
// OpenStage prepares an output folder: it refuses to replace earlier results
// unless asked to, writes every file to a hidden temporary file beside its
// final name, and Commit moves them all into place only after each one was
// written and synced. A failed run leaves the folder as it was.
//
// The package never touches images; it imports the factor and track types
// only.
package export
