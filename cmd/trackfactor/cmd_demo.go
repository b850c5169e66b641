package main

import (
	"fmt"
	"os"
	"path/filepath"

	"github.com/urfave/cli/v2"

	"trackfactor/eval"
	"trackfactor/pipeline"
	"trackfactor/track"
	"trackfactor/track/synth"
)

type demoOptions struct {
	runOptions
	frames    int
	stepDeg   float64
	elevation float64
	noise     float64
	seed      int64
	backdrop  bool
}

func demoCommand() *cli.Command {
	o := &demoOptions{}
	flags := []cli.Flag{
		&cli.IntFlag{Name: "frames", Usage: "frames to render", Value: 24, Destination: &o.frames},
		&cli.Float64Flag{Name: "scene-step-deg", Usage: "turntable step between rendered frames, degrees", Value: 1, Destination: &o.stepDeg},
		&cli.Float64Flag{Name: "elevation", Usage: "camera elevation above the turntable plane, degrees", Value: 20, Destination: &o.elevation},
		&cli.Float64Flag{Name: "image-noise", Usage: "Gaussian image noise, grey levels", Value: 1, Destination: &o.noise},
		&cli.Int64Flag{Name: "seed", Usage: "texture and noise seed", Value: 1, Destination: &o.seed},
		&cli.BoolFlag{Name: "backdrop", Usage: "render a static textured backdrop behind the part", Destination: &o.backdrop},
	}
	flags = append(flags, o.runOptions.flags()...)
	return &cli.Command{
		Name:  "demo",
		Usage: "render the built-in turntable scene, reconstruct it and score the result against its ground truth",
		Description: "Renders a machined part (a stepped shaft with a hex collar) turning on a\n" +
			"turntable, seen by an orthographic camera, into OUT/frames; runs the whole\n" +
			"pipeline on those frames into OUT; prints the error against the scene's\n" +
			"ground truth.\n\nExample: trackfactor demo -o out/demo",
		Flags: flags,
		Action: func(c *cli.Context) error {
			if err := rejectFlagsAfterArgs(c, 0); err != nil {
				return err
			}
			if err := o.out.validate(); err != nil {
				return err
			}
			scene, err := synth.New(synth.Options{
				Seed: o.seed, Frames: o.frames, StepDeg: o.stepDeg,
				ElevationDeg: o.elevation, ElevationSet: true,
				NoiseSigma: o.noise, Backdrop: o.backdrop,
			})
			if err != nil {
				return usagef("%v", err)
			}
			framesDir := filepath.Join(o.out.dir, "frames")
			cfg, err := o.config(c, framesDir)
			if err != nil {
				return err
			}
			// Refuse an occupied output folder before rendering anything.
			if !o.out.force {
				if err := pipeline.CheckOut(o.out.dir); err != nil {
					return err
				}
			}
			if err := os.MkdirAll(framesDir, 0o755); err != nil {
				return fmt.Errorf("demo: %w", err)
			}
			if !o.common.quiet {
				so := scene.Options()
				fmt.Fprintf(c.App.ErrWriter, "rendering %d frames of %d×%d px (orthographic, %.5f mm per pixel: try --pixel-size with it) into %s\n", scene.Len(), so.Width, so.Height, 1/so.PixelsPerMM, framesDir)
			}
			if _, err := scene.WriteFrames(c.Context, framesDir, func(done, total int) {
				if cfg.Progress != nil {
					cfg.Progress("render", done, total)
				}
			}); err != nil {
				return err
			}
			cfg.Force = true // the frames folder now lives in OUT
			cfg.Settings["demo"] = (map[string]any{
				"frames": o.frames, "step_deg": o.stepDeg, "elevation_deg": o.elevation,
				"image_noise": o.noise, "seed": o.seed, "backdrop": o.backdrop, "projection": "orthographic",
			})
			res, err := pipeline.Run(c.Context, cfg)
			if err != nil {
				return err
			}
			rep, err := eval.Score(res.Rec, firstSeen(res.Set), scene)
			if err != nil {
				return err
			}
			if !o.common.quiet {
				w := c.App.Writer
				printSummary(w, res, cfg.Out)
				fmt.Fprintf(w, "ground truth (the rendered scene):\n")
				fmt.Fprintf(w, "  rotation  median %.3f°, max %.3f° over %d view pairs (relative rotations)\n", rep.Rotation.MedianDeg, rep.Rotation.MaxDeg, rep.Rotation.Pairs)
				order := "as in the scene"
				if rep.Rotation.Mirrored {
					order = "reversed (the mirror image of the scene)"
				}
				fmt.Fprintf(w, "  depth     %s\n", order)
				fmt.Fprintf(w, "  structure RMS %.3f mm = %.3f %% of the part's %.1f mm diagonal, over %d points (%d off the part), after similarity alignment\n",
					rep.StructureRMS, rep.StructurePct, scene.Diagonal(), rep.Points, rep.OffObject)
				if u := res.Doc.Units; u == "mm" {
					fmt.Fprintf(w, "  scale     1 mm of the result is %.5f mm of the part (%+.3f %%)\n", rep.Scale, 100*(rep.Scale-1))
				}
				sigma := map[int]float64{}
				for _, p := range res.Doc.Points {
					if p.Sigma != nil {
						sigma[p.Track] = *p.Sigma
					}
				}
				if med, rms, n := eval.SigmaRatio(rep.PointError, sigma, rep.Scale); n > 0 {
					fmt.Fprintf(w, "  sigma     actual point errors are %.1f× the predicted σ (median over %d points; RMS %.1f×); 1 would mean σ tells the whole error — see README, Limits\n", med, n, rms)
				}
				if r := res.Refinement; r != nil && r.Turntable != nil {
					if ae, err := eval.CompareAngles(r.Turntable.AnglesDeg, r.Turntable.Frames, scene.AngleDeg); err == nil {
						fmt.Fprintf(w, "  turntable angles: error RMS %.4f°, max %.4f°, standard deviation %.4f° over %d frames\n", ae.RMSDeg, ae.MaxDeg, ae.StdDeg, ae.Frames)
					}
				}
			}
			return nil
		},
	}
}

// firstSeen maps every track id to its first observation.
func firstSeen(set *track.Set) map[int]eval.Seen {
	m := make(map[int]eval.Seen, len(set.Tracks))
	for _, t := range set.Tracks {
		if len(t.Obs) > 0 {
			o := t.Obs[0]
			m[t.ID] = eval.Seen{Frame: o.Frame, X: o.X, Y: o.Y}
		}
	}
	return m
}
