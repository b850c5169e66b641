package pipeline

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"time"

	"trackfactor/export"
	"trackfactor/factor"
	"trackfactor/track"
)

// RefineExisting refines a result written earlier: it reads
// reconstruction.json and tracks.csv from dir, rebuilds the reconstruction
// and the measurements it was made from, runs the refinement stage of cfg
// (bundle adjustment, turntable, scale) and writes the refined result to
// cfg.Out. cfg.Factor.Intrinsics must be given again for a perspective
// result or to resolve an affine result's depth order.
func RefineExisting(ctx context.Context, dir string, cfg Config) (*Result, error) {
	if cfg.Out != "" && !cfg.Force {
		if err := CheckOut(cfg.Out); err != nil {
			return nil, err
		}
	}
	jf, err := os.Open(filepath.Join(dir, export.FileReconstruction))
	if err != nil {
		return nil, &InputError{fmt.Errorf("refine: %w; give the folder of an earlier run", err)}
	}
	defer jf.Close()
	doc, err := export.ReadJSON(jf)
	if err != nil {
		return nil, &InputError{fmt.Errorf("refine: %s: %w", jf.Name(), err)}
	}
	if doc.Units != "" && doc.Units != "px" {
		return nil, &InputError{fmt.Errorf("refine: %s is already scaled to %s; refine the unscaled result (run again without --pixel-size/--reference)", jf.Name(), doc.Units)}
	}
	tf, err := os.Open(filepath.Join(dir, export.FileTracks))
	if err != nil {
		return nil, &InputError{fmt.Errorf("refine: %w; the tracks of the run are needed", err)}
	}
	defer tf.Close()
	set, err := track.ReadCSV(tf, track.ReadCSVOptions{Width: doc.Input.Width, Height: doc.Input.Height, Frames: doc.Input.Frames})
	if err != nil {
		return nil, &InputError{fmt.Errorf("refine: %s: %w", tf.Name(), err)}
	}
	rec := &factor.Reconstruction{Model: factor.Model(doc.Model), Intrinsics: cfg.Factor.Intrinsics}
	for _, c := range doc.Cameras {
		rec.Cameras = append(rec.Cameras, factor.Camera{Frame: c.Frame, R: c.Rotation, T: c.Translation, Scale: c.Scale, RMS: c.RMSPx})
	}
	colours := map[int][3]uint8{}
	for _, p := range doc.Points {
		rec.Points = append(rec.Points, factor.Point{Track: p.Track, X: p.XYZ, Views: p.Views, RMS: p.RMSPx})
		colours[p.Track] = p.RGB
	}
	rec.Diagnostics.MirrorAmbiguous = doc.Diagnostics.MirrorAmbiguous
	rec.Diagnostics.SingularValues = doc.Diagnostics.SingularValues
	rec.Diagnostics.RMS = doc.Diagnostics.RMSPx
	rec.Diagnostics.ExpectedRMS = doc.Diagnostics.ExpectedRMSPx
	for i := range set.Tracks {
		set.Tracks[i].RGB = colours[set.Tracks[i].ID]
	}
	res := &Result{Set: set, Rec: rec, Timing: map[string]float64{}}
	res.Window = Window{First: 0, Last: len(set.Frames) - 1, Tracks: set.Tracks}
	t0 := time.Now()
	if err := refine(ctx, res, fixThreads(cfg)); err != nil {
		return nil, err
	}
	res.Timing["refine"] = time.Since(t0).Seconds()
	if cfg.Input == "" {
		cfg.Input = doc.Input.Source
	}
	res.Doc = buildDocument(res, cfg)
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	if cfg.Out != "" {
		if err := Write(res, cfg); err != nil {
			return nil, err
		}
	}
	return res, nil
}
