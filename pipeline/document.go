package pipeline

import (
	"encoding/json"
	"math"
	"reflect"
	"strings"

	"trackfactor/export"
	"trackfactor/factor"
)

// addStageReports fills the document's optional per-stage reports and the
// per-point uncertainties.
func addStageReports(doc *export.Document, res *Result, timing bool) {
	d := &doc.Diagnostics
	rawJSON := func(v any) json.RawMessage { return rawJSONTimed(v, timing) }
	if res.Missing != nil {
		d.MissingData = rawJSON(res.Missing)
	}
	if len(res.Rec.Diagnostics.Candidates) > 0 || len(res.Rec.Diagnostics.Convergence) > 0 {
		d.Model = rawJSON(map[string]any{
			"candidates":  res.Rec.Diagnostics.Candidates,
			"convergence": res.Rec.Diagnostics.Convergence,
		})
	}
	r := res.Refinement
	if r == nil {
		return
	}
	doc.Units = r.Units
	if r.Summary != nil {
		s := r.Summary
		d.Refinement = rawJSON(map[string]any{
			"model": s.Model, "motion": s.Motion, "loss": s.Loss, "loss_scale_px": s.LossScale,
			"solver": s.Solver, "threads": s.ThreadsUsed,
			"cameras": s.Cameras, "points": s.Points, "skipped_points": s.SkippedPoints,
			"observations": s.Observations, "residuals": s.Residuals, "parameters": s.Parameters,
			"gauge": s.Gauge, "gauge_track": s.GaugeTrack,
			"initial_cost_px2": s.InitialCost, "final_cost_px2": s.FinalCost,
			"initial_rms_px": s.InitialRMS, "final_rms_px": s.FinalRMS, "noise_sigma_px": s.NoiseSigma,
			"iterations": s.Iterations, "successful_steps": s.SuccessfulSteps, "rejected_steps": s.RejectedSteps,
			"termination": s.Termination, "message": s.Message, "usable": s.Usable(),
			"initial_focal_px": s.InitialFocal, "final_focal_px": s.FinalFocal,
			"initial_k1": s.InitialK1, "final_k1": s.FinalK1,
		})
	} else if r.Skipped != "" {
		d.Refinement = rawJSON(map[string]any{"skipped": r.Skipped})
	}
	if r.Turntable != nil {
		d.Turntable = rawJSON(r.Turntable)
	}
	if r.Mirror != nil {
		d.Mirror = rawJSON(map[string]any{
			"choice": r.Mirror.Choice, "cost_ratio": r.Mirror.CostRatio,
			"threshold": r.Mirror.Threshold, "message": r.Mirror.Message,
		})
	}
	if r.Scale != nil {
		sc := map[string]any{
			"unit": r.Scale.Unit, "factor": r.Scale.Factor,
			"relative_sigma": r.Scale.RelativeSigma, "camera_scale_spread": r.Scale.ScaleSpread,
		}
		if u := r.Reference; u != nil {
			sc["reference"] = map[string]any{"frame": u.Frame, "track_a": u.TrackA, "track_b": u.TrackB,
				"snap_a_px": u.SnapA, "snap_b_px": u.SnapB}
		}
		d.Scale = rawJSON(sc)
	}
	if sig := pointSigmas(res); sig != nil {
		for i := range doc.Points {
			if sig[i] > 0 {
				v := sig[i]
				doc.Points[i].Sigma = &v
			}
		}
	}
}

// rawJSONTimed encodes v with every non-finite number written as null and
// struct fields without a json tag named in snake_case, so a stage's report
// can go into the JSON whatever it holds. Without timing, wall-clock
// entries (keys "seconds", "timing", "timing_s") and the thread counts of
// this machine ("threads", "threads_used") are left out so the file is the
// same on every run and every machine.
func rawJSONTimed(v any, timing bool) json.RawMessage {
	p := plain(reflect.ValueOf(v))
	if !timing {
		p = dropClock(p)
	}
	b, err := json.Marshal(p)
	if err != nil {
		b, _ = json.Marshal(map[string]string{"error": err.Error()})
	}
	return b
}

// plain turns v into maps, slices and scalars with non-finite floats as nil.
func plain(v reflect.Value) any {
	switch v.Kind() {
	case reflect.Invalid:
		return nil
	case reflect.Pointer, reflect.Interface:
		if v.IsNil() {
			return nil
		}
		return plain(v.Elem())
	case reflect.Float32, reflect.Float64:
		f := v.Float()
		if math.IsNaN(f) || math.IsInf(f, 0) {
			return nil
		}
		return f
	case reflect.Slice, reflect.Array:
		if v.Kind() == reflect.Slice && v.IsNil() {
			return nil
		}
		out := make([]any, v.Len())
		for i := range out {
			out[i] = plain(v.Index(i))
		}
		return out
	case reflect.Map:
		out := map[string]any{}
		it := v.MapRange()
		for it.Next() {
			out[toKey(it.Key())] = plain(it.Value())
		}
		return out
	case reflect.Struct:
		if w, ok := v.Interface().(factor.Warning); ok {
			return map[string]any{"code": w.Code, "message": w.Message}
		}
		out := map[string]any{}
		t := v.Type()
		for i := 0; i < t.NumField(); i++ {
			f := t.Field(i)
			if !f.IsExported() {
				continue
			}
			fv := v.Field(i)
			if fv.Kind() == reflect.Func || fv.Kind() == reflect.Chan {
				continue
			}
			name := snake(f.Name)
			if tag := f.Tag.Get("json"); tag != "" {
				n, opts, _ := strings.Cut(tag, ",")
				if n == "-" {
					continue
				}
				if n != "" {
					name = n
				}
				if strings.Contains(opts, "omitempty") && fv.IsZero() {
					continue
				}
			}
			out[name] = plain(fv)
		}
		return out
	case reflect.Int64:
		if d, ok := v.Interface().(interface{ Seconds() float64 }); ok {
			return d.Seconds()
		}
		return v.Int()
	default:
		if s, ok := v.Interface().(error); ok {
			return s.Error()
		}
		return v.Interface()
	}
}

func toKey(k reflect.Value) string {
	if k.Kind() == reflect.String {
		return k.String()
	}
	b, _ := json.Marshal(k.Interface())
	return strings.Trim(string(b), `"`)
}

// dropClock removes wall-clock entries from a plain value.
func dropClock(v any) any {
	switch x := v.(type) {
	case map[string]any:
		for k := range x {
			switch k {
			case "seconds", "timing", "timing_s", "threads", "threads_used":
				delete(x, k)
			default:
				x[k] = dropClock(x[k])
			}
		}
	case []any:
		for i := range x {
			x[i] = dropClock(x[i])
		}
	}
	return v
}
