package export

import (
	"errors"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"reflect"
	"sort"
	"strings"
	"testing"
)

// snapshot lists every entry of dir (recursively) with its content and
// mode, so a test can tell "exactly as before".
func snapshot(t *testing.T, dir string) map[string]string {
	t.Helper()
	out := map[string]string{}
	err := filepath.WalkDir(dir, func(path string, d fs.DirEntry, err error) error {
		if err != nil {
			return err
		}
		rel, _ := filepath.Rel(dir, path)
		info, err := d.Info()
		if err != nil {
			return err
		}
		if d.IsDir() {
			out[rel] = "dir " + info.Mode().String()
			return nil
		}
		b, err := os.ReadFile(path)
		if err != nil {
			return err
		}
		out[rel] = info.Mode().String() + " " + string(b)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return out
}

func names(m map[string]string) []string {
	var s []string
	for k := range m {
		s = append(s, k)
	}
	sort.Strings(s)
	return s
}

func mustWrite(t *testing.T, path, content string) {
	t.Helper()
	if err := os.WriteFile(path, []byte(content), 0o644); err != nil {
		t.Fatal(err)
	}
}

// stageFiles creates and writes name→content in st.
func stageFiles(t *testing.T, st *Stage, files map[string]string) {
	t.Helper()
	for _, n := range names(files) {
		w, err := st.Create(n)
		if err != nil {
			t.Fatal(err)
		}
		if _, err := io.WriteString(w, files[n]); err != nil {
			t.Fatal(err)
		}
		if err := w.Close(); err != nil {
			t.Fatal(err)
		}
	}
}

func TestStageCreatesFolderAndCommits(t *testing.T) {
	out := filepath.Join(t.TempDir(), "runs", "first")
	st, err := OpenStage(out, false)
	if err != nil {
		t.Fatal(err)
	}
	stageFiles(t, st, map[string]string{FileReconstruction: "{}\n", FilePoints: "ply\n"})
	if got := names(snapshot(t, out)); len(got) != 3 { // ".", two temp files
		t.Errorf("before Commit the folder holds %v", got)
	}
	if err := st.Commit(); err != nil {
		t.Fatal(err)
	}
	got := snapshot(t, out)
	if !reflect.DeepEqual(names(got), []string{".", FilePoints, FileReconstruction}) {
		t.Errorf("after Commit: %v", names(got))
	}
	if !strings.HasSuffix(got[FileReconstruction], " {}\n") {
		t.Errorf("content %q", got[FileReconstruction])
	}
	st.Abort() // safe after Commit: must not remove anything
	if !reflect.DeepEqual(snapshot(t, out), got) {
		t.Error("Abort after Commit changed the folder")
	}
	if err := st.Commit(); err == nil {
		t.Error("second Commit accepted")
	}
}

func TestStageRefusesExistingResultsWithoutForce(t *testing.T) {
	for _, name := range ResultFiles() {
		dir := t.TempDir()
		mustWrite(t, filepath.Join(dir, name), "old")
		before := snapshot(t, dir)
		_, err := OpenStage(dir, false)
		var ee *ExistsError
		if !errors.As(err, &ee) {
			t.Fatalf("%s: error %v, want *ExistsError", name, err)
		}
		msg := err.Error()
		if !strings.Contains(msg, filepath.Join(dir, name)) || !strings.Contains(msg, "use --force to replace it") || strings.Contains(msg, "\n") {
			t.Errorf("%s: message %q", name, msg)
		}
		if !reflect.DeepEqual(snapshot(t, dir), before) {
			t.Errorf("%s: refused OpenStage changed the folder", name)
		}
	}
}

func TestStageForceReplacesAndLeavesOthersAlone(t *testing.T) {
	dir := t.TempDir()
	mustWrite(t, filepath.Join(dir, FilePoints), "old points")
	mustWrite(t, filepath.Join(dir, FileReport), "old report")
	mustWrite(t, filepath.Join(dir, "notes.txt"), "mine")
	st, err := OpenStage(dir, true)
	if err != nil {
		t.Fatal(err)
	}
	stageFiles(t, st, map[string]string{FilePoints: "new points", FileTracks: "track,frame,x,y\n"})
	if err := st.Commit(); err != nil {
		t.Fatal(err)
	}
	got := snapshot(t, dir)
	if !reflect.DeepEqual(names(got), []string{".", "notes.txt", FilePoints, FileReport, FileTracks}) {
		t.Fatalf("files %v", names(got))
	}
	for name, want := range map[string]string{FilePoints: "new points", FileReport: "old report", "notes.txt": "mine"} {
		if !strings.HasSuffix(got[name], " "+want) {
			t.Errorf("%s = %q, want %q", name, got[name], want)
		}
	}
}

func TestStageAbortLeavesNoTempFiles(t *testing.T) {
	dir := t.TempDir()
	mustWrite(t, filepath.Join(dir, "notes.txt"), "mine")
	before := snapshot(t, dir)
	st, err := OpenStage(dir, false)
	if err != nil {
		t.Fatal(err)
	}
	stageFiles(t, st, map[string]string{FileReconstruction: "{}"})
	w, err := st.Create(FileCameras) // left open on purpose
	if err != nil {
		t.Fatal(err)
	}
	io.WriteString(w, "partial")
	st.Abort()
	st.Abort() // idempotent
	if got := snapshot(t, dir); !reflect.DeepEqual(got, before) {
		t.Errorf("after Abort: %v, before: %v", names(got), names(before))
	}
	if _, err := st.Create(FilePoints); err == nil {
		t.Error("Create after Abort accepted")
	}
}

func TestStageAbortRemovesCreatedFolders(t *testing.T) {
	root := t.TempDir()
	before := snapshot(t, root)
	st, err := OpenStage(filepath.Join(root, "a", "b"), false)
	if err != nil {
		t.Fatal(err)
	}
	stageFiles(t, st, map[string]string{FilePoints: "x"})
	st.Abort()
	if got := snapshot(t, root); !reflect.DeepEqual(got, before) {
		t.Errorf("after Abort: %v", names(got))
	}
}

// errReader fails after handing out some bytes, like a writer stage whose
// source breaks half-way.
type errReader struct{ n int }

func (r *errReader) Read(p []byte) (int, error) {
	if r.n <= 0 {
		return 0, errors.New("source failed")
	}
	k := min(len(p), r.n)
	for i := range p[:k] {
		p[i] = 'x'
	}
	r.n -= k
	return k, nil
}

func TestStageFailedWriteLeavesFolderAsBefore(t *testing.T) {
	dir := t.TempDir()
	mustWrite(t, filepath.Join(dir, FileReconstruction), "old json")
	mustWrite(t, filepath.Join(dir, "notes.txt"), "mine")
	before := snapshot(t, dir)

	// The producer of a file fails: the caller aborts.
	st, err := OpenStage(dir, true)
	if err != nil {
		t.Fatal(err)
	}
	stageFiles(t, st, map[string]string{FilePoints: "new points"})
	w, _ := st.Create(FileReconstruction)
	if _, err := io.Copy(w, &errReader{n: 100}); err == nil {
		t.Fatal("copy from a failing source succeeded")
	}
	st.Abort()
	if got := snapshot(t, dir); !reflect.DeepEqual(got, before) {
		t.Errorf("after a failed producer: %v", names(got))
	}

	// A write to a staged file fails: Commit refuses and rolls back.
	st, err = OpenStage(dir, true)
	if err != nil {
		t.Fatal(err)
	}
	stageFiles(t, st, map[string]string{FilePoints: "new points"})
	w, _ = st.Create(FileReconstruction)
	w.Close()
	if _, err := w.Write([]byte("late")); err == nil {
		t.Fatal("write after Close succeeded")
	}
	if err := st.Commit(); err == nil || !strings.Contains(err.Error(), "nothing was replaced") {
		t.Errorf("Commit after a failed write: %v", err)
	}
	if got := snapshot(t, dir); !reflect.DeepEqual(got, before) {
		t.Errorf("after a failed write: %v", names(got))
	}

	// A file left open is refused too.
	st, _ = OpenStage(dir, true)
	st.Create(FilePoints)
	if err := st.Commit(); err == nil || !strings.Contains(err.Error(), "still open") {
		t.Errorf("Commit with an open file: %v", err)
	}
	if got := snapshot(t, dir); !reflect.DeepEqual(got, before) {
		t.Errorf("after refusing an open file: %v", names(got))
	}
}

// A rename that fails half-way through Commit (simulated) must restore the
// earlier files.
func TestStageCommitRollsBackFailedRename(t *testing.T) {
	dir := t.TempDir()
	mustWrite(t, filepath.Join(dir, FileCameras), "old cameras")
	mustWrite(t, filepath.Join(dir, FilePoints), "old points")
	mustWrite(t, filepath.Join(dir, "notes.txt"), "mine")
	before := snapshot(t, dir)
	st, err := OpenStage(dir, true)
	if err != nil {
		t.Fatal(err)
	}
	stageFiles(t, st, map[string]string{FileCameras: "new cameras", FilePoints: "new points", FileReconstruction: "{}"})
	calls := 0
	st.rename = func(from, to string) error {
		// Fail the second move of a staged file into place.
		if strings.Contains(from, ".tmp-") {
			calls++
			if calls == 2 {
				return &os.LinkError{Op: "rename", Old: from, New: to, Err: errors.New("input/output error")}
			}
		}
		return os.Rename(from, to)
	}
	err = st.Commit()
	if err == nil || !strings.Contains(err.Error(), "nothing was replaced") || !strings.Contains(err.Error(), "input/output error") {
		t.Errorf("Commit error %v", err)
	}
	if got := snapshot(t, dir); !reflect.DeepEqual(got, before) {
		t.Errorf("after a failed rename the folder holds %v (%v), before %v", names(got), got, before)
	}
}

func TestStageCreateChecks(t *testing.T) {
	dir := t.TempDir()
	mustWrite(t, filepath.Join(dir, "summary.txt"), "mine")
	st, err := OpenStage(dir, false)
	if err != nil {
		t.Fatal(err)
	}
	defer st.Abort()
	for _, bad := range []string{"", ".", "..", "sub/x.ply", `a\b`} {
		if _, err := st.Create(bad); err == nil {
			t.Errorf("Create(%q) accepted", bad)
		}
	}
	var ee *ExistsError
	if _, err := st.Create("summary.txt"); !errors.As(err, &ee) {
		t.Errorf("Create over a foreign file without force: %v", err)
	}
	if _, err := st.Create(FilePoints); err != nil {
		t.Fatal(err)
	}
	if _, err := st.Create(FilePoints); err == nil {
		t.Error("second Create of the same name accepted")
	}
}

func TestOpenStageRejectsFolderInTheWay(t *testing.T) {
	dir := t.TempDir()
	if err := os.Mkdir(filepath.Join(dir, FilePoints), 0o755); err != nil {
		t.Fatal(err)
	}
	if _, err := OpenStage(dir, true); err == nil || !strings.Contains(err.Error(), "is a folder") {
		t.Errorf("error %v", err)
	}
	file := filepath.Join(dir, "plain")
	mustWrite(t, file, "x")
	if _, err := OpenStage(file, false); err == nil || !strings.Contains(err.Error(), "is a file") {
		t.Errorf("error %v", err)
	}
}

func TestOpenStageReadOnlyFolder(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "ro")
	if err := os.Mkdir(dir, 0o555); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { os.Chmod(dir, 0o755) })
	// Privileged users can write anyway: find out by trying.
	if f, err := os.Create(filepath.Join(dir, "probe")); err == nil {
		f.Close()
		os.Remove(f.Name())
		t.Skip("this user can write into a read-only folder")
	}
	_, err := OpenStage(dir, false)
	if err == nil {
		t.Fatal("read-only folder accepted")
	}
	msg := err.Error()
	if !strings.Contains(msg, "cannot write in output folder "+dir) || !strings.Contains(msg, "permission denied") || strings.Contains(msg, "\n") {
		t.Errorf("message %q", msg)
	}
}

func TestWriteFileAtomic(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "summary.json")
	mustWrite(t, filepath.Join(dir, "notes.txt"), "mine")
	for _, content := range []string{"first", "second"} {
		if err := WriteFileAtomic(path, []byte(content), 0o644); err != nil {
			t.Fatal(err)
		}
		got := snapshot(t, dir)
		if !reflect.DeepEqual(names(got), []string{".", "notes.txt", "summary.json"}) || !strings.HasSuffix(got["summary.json"], " "+content) {
			t.Errorf("after writing %q: %v", content, got)
		}
	}
	if err := WriteFileAtomic(filepath.Join(dir, "missing", "x"), []byte("x"), 0o644); err == nil {
		t.Error("write into a missing folder accepted")
	}
}
