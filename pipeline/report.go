package pipeline

import (
	"io"
	"os"
	"sort"

	"trackfactor/export"
	"trackfactor/report"
	"trackfactor/track"
)

// writeReport writes the HTML report of a run (report.html): the document,
// the tracks used and not used, and the frames when the input is a folder
// of images the report can decode.
func writeReport(w io.Writer, res *Result, cfg Config) error {
	return report.Write(w, res.Doc, ReportExtras(res, cfg.Input))
}

// ReportExtras gathers what the report shows beyond the document: the
// tracks the reconstruction used, the other tracks with the reason they
// were not used, and a frame loader when input is a folder.
func ReportExtras(res *Result, input string) report.Extras {
	ex := report.Extras{
		Kept:     []report.Track{},
		Rejected: []report.Track{},
		Files:    []string{export.FileReconstruction, export.FilePoints, export.FileCameras, export.FileTracks},
	}
	kept := map[int]bool{}
	for _, t := range res.Window.Tracks {
		kept[t.ID] = true
		ex.Kept = append(ex.Kept, reportTrack(t, ""))
	}
	outlier := map[int]bool{}
	for _, id := range res.Rejected {
		outlier[id] = true
	}
	if res.Set != nil {
		for _, t := range res.Set.Tracks {
			if kept[t.ID] {
				continue
			}
			reason := track.DropIncomplete
			if outlier[t.ID] {
				reason = report.ReasonOutlier
			}
			ex.Rejected = append(ex.Rejected, reportTrack(t, reason))
		}
		if st, err := os.Stat(input); err == nil && st.IsDir() {
			ex.Frame = report.FolderFrames(input, res.Set.Frames)
		}
	}
	sort.Slice(ex.Kept, func(i, j int) bool { return ex.Kept[i].ID < ex.Kept[j].ID })
	sort.Slice(ex.Rejected, func(i, j int) bool { return ex.Rejected[i].ID < ex.Rejected[j].ID })
	return ex
}

// ReportTracks converts tracks for the report.
func ReportTracks(ts []track.Track) []report.Track {
	out := make([]report.Track, 0, len(ts))
	for _, t := range ts {
		out = append(out, reportTrack(t, ""))
	}
	return out
}

func reportTrack(t track.Track, reason string) report.Track {
	rt := report.Track{ID: t.ID, Reason: reason, Obs: make([]report.Obs, len(t.Obs))}
	for i, o := range t.Obs {
		rt.Obs[i] = report.Obs{Frame: o.Frame, X: o.X, Y: o.Y}
	}
	return rt
}
