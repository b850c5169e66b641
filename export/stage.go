package export

import (
	"crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"strings"
)

// Names of the result files of a run folder.
const (
	FileReconstruction = "reconstruction.json"
	FilePoints         = "points.ply"
	FileCameras        = "cameras.ply"
	FileTracks         = "tracks.csv"
	FileReport         = "report.html"
)

// ResultFiles returns the names OpenStage refuses to replace without force,
// in the order they are checked.
func ResultFiles() []string {
	return []string{FileReconstruction, FilePoints, FileCameras, FileTracks, FileReport}
}

// ExistsError reports a result file that is already there and may only be
// replaced with force.
type ExistsError struct {
	Path string
}

func (e *ExistsError) Error() string {
	return fmt.Sprintf("export: %s already exists; use --force to replace it", e.Path)
}

type stageState int

const (
	stageOpen stageState = iota
	stageCommitted
	stageAborted
)

// Stage writes the files of one run into a folder all at once: each file
// goes to a hidden temporary file in the folder (".name.tmp-XXXXXXXX") and
// Commit renames them into place only when every one was written, synced and
// closed. Until then, and after any failure, the folder holds exactly what it
// held before. A Stage is not safe for concurrent use.
type Stage struct {
	dir     string
	force   bool
	created []string // folders OpenStage created, deepest first
	files   []*stagedFile
	state   stageState
	// rename moves a file; os.Rename, replaced in tests to simulate a
	// failing file system.
	rename func(oldpath, newpath string) error
}

// OpenStage prepares outDir for writing, creating it (and missing parent
// folders) if needed. Unless force is set it refuses, with an *ExistsError,
// when outDir already holds any of ResultFiles. A result name taken by a
// folder is refused even with force. It checks that files can be created in
// outDir, so that a read-only folder is reported before any work is done.
// Files in outDir that are not ours are never touched.
func OpenStage(outDir string, force bool) (*Stage, error) {
	if outDir == "" {
		return nil, errors.New("export: no output folder given; name one")
	}
	st := &Stage{dir: outDir, force: force, rename: os.Rename}
	fi, err := os.Stat(outDir)
	switch {
	case err == nil && !fi.IsDir():
		return nil, fmt.Errorf("export: output folder %s is a file; choose a folder", outDir)
	case errors.Is(err, fs.ErrNotExist):
		for d := filepath.Clean(outDir); ; d = filepath.Dir(d) {
			if _, err := os.Lstat(d); err == nil || !errors.Is(err, fs.ErrNotExist) {
				break
			}
			st.created = append(st.created, d)
			if filepath.Dir(d) == d {
				break
			}
		}
		if err := os.MkdirAll(outDir, 0o777); err != nil {
			st.removeCreated()
			return nil, fmt.Errorf("export: cannot create output folder %s: %w; choose another folder or fix its permissions", outDir, unwrapPath(err))
		}
	case err != nil:
		return nil, fmt.Errorf("export: cannot open output folder %s: %w; check the path", outDir, unwrapPath(err))
	}
	for _, name := range ResultFiles() {
		if err := st.checkTarget(name); err != nil {
			st.removeCreated()
			return nil, err
		}
	}
	f, tmp, err := createTemp(outDir, ".trackfactor-probe", 0o666)
	if err != nil {
		st.removeCreated()
		return nil, fmt.Errorf("export: cannot write in output folder %s: %w; choose another folder or fix its permissions", outDir, unwrapPath(err))
	}
	f.Close()
	os.Remove(tmp)
	return st, nil
}

// Dir returns the output folder.
func (st *Stage) Dir() string { return st.dir }

// checkTarget refuses a target that exists unless force, and a target that
// is a folder always.
func (st *Stage) checkTarget(name string) error {
	path := filepath.Join(st.dir, name)
	fi, err := os.Lstat(path)
	if errors.Is(err, fs.ErrNotExist) {
		return nil
	}
	if err != nil {
		return fmt.Errorf("export: cannot check %s: %w; check the output folder", path, unwrapPath(err))
	}
	if fi.IsDir() {
		return fmt.Errorf("export: %s is a folder, not a result file; move it away or choose another output folder", path)
	}
	if !st.force {
		return &ExistsError{Path: path}
	}
	return nil
}

// Create starts the file name (a plain file name, no folders) in the stage
// and returns a writer for it. Close the writer when done: Close syncs the
// data to disk, and Commit refuses files that are still open or whose
// writes failed. A name not among ResultFiles is checked like them: it may
// only replace an existing file with force.
func (st *Stage) Create(name string) (io.WriteCloser, error) {
	if st.state != stageOpen {
		return nil, fmt.Errorf("export: Create(%q) on a stage that was already committed or aborted; open a new stage", name)
	}
	if name == "" || name == "." || name == ".." || strings.ContainsAny(name, `/\`) || filepath.Base(name) != name {
		return nil, fmt.Errorf("export: stage file name %q must be a plain file name without folders", name)
	}
	for _, f := range st.files {
		if f.name == name {
			return nil, fmt.Errorf("export: %s was already created in this stage; create each file once", name)
		}
	}
	if err := st.checkTarget(name); err != nil {
		return nil, err
	}
	f, tmp, err := createTemp(st.dir, "."+name+".tmp", 0o666)
	if err != nil {
		return nil, fmt.Errorf("export: cannot create a temporary file for %s in %s: %w; check free space and permissions", name, st.dir, unwrapPath(err))
	}
	sf := &stagedFile{name: name, tmp: tmp, f: f}
	st.files = append(st.files, sf)
	return sf, nil
}

// Commit moves every created file into place. Existing files of the same
// names are first moved aside and are restored if any rename fails; they
// are deleted once every new file is in place. The folder is synced last.
// If Commit fails the stage is aborted and the folder holds what it held
// before OpenStage (an error says so otherwise). Commit on a committed or
// aborted stage is an error.
func (st *Stage) Commit() (err error) {
	if st.state != stageOpen {
		return errors.New("export: Commit on a stage that was already committed or aborted; open a new stage")
	}
	defer func() {
		if err != nil {
			st.Abort()
		}
	}()
	for _, f := range st.files {
		if !f.closed {
			return fmt.Errorf("export: %s is still open; close every staged file before Commit (nothing was replaced)", f.name)
		}
		if f.err != nil {
			return fmt.Errorf("export: writing %s failed (%w); nothing was replaced", f.name, f.err)
		}
		if err := st.checkTarget(f.name); err != nil {
			return err
		}
	}
	type backup struct{ target, old string }
	var backups []backup
	restore := func() error {
		var failed []string
		for i := len(backups) - 1; i >= 0; i-- {
			if err := st.rename(backups[i].old, backups[i].target); err != nil {
				failed = append(failed, fmt.Sprintf("%s is at %s", backups[i].target, backups[i].old))
			}
		}
		if len(failed) > 0 {
			return fmt.Errorf("the earlier files could not all be restored: %s; rename them back by hand", strings.Join(failed, ", "))
		}
		return nil
	}
	for _, f := range st.files {
		target := filepath.Join(st.dir, f.name)
		if _, err := os.Lstat(target); err != nil {
			continue // nothing to move aside
		}
		old := filepath.Join(st.dir, "."+f.name+".old-"+randomSuffix())
		if err := st.rename(target, old); err != nil {
			if rerr := restore(); rerr != nil {
				return fmt.Errorf("export: cannot move %s aside: %w; %w", target, unwrapPath(err), rerr)
			}
			return fmt.Errorf("export: cannot move %s aside: %w; nothing was replaced", target, unwrapPath(err))
		}
		backups = append(backups, backup{target, old})
	}
	var placed []string
	for _, f := range st.files {
		target := filepath.Join(st.dir, f.name)
		if err := st.rename(f.tmp, target); err != nil {
			for _, p := range placed {
				os.Remove(p)
			}
			if rerr := restore(); rerr != nil {
				return fmt.Errorf("export: cannot move %s into place: %w; %w", target, unwrapPath(err), rerr)
			}
			return fmt.Errorf("export: cannot move %s into place: %w; nothing was replaced", target, unwrapPath(err))
		}
		placed = append(placed, target)
	}
	st.state = stageCommitted
	var problems []string
	for _, b := range backups {
		if err := os.Remove(b.old); err != nil {
			problems = append(problems, fmt.Sprintf("the old copy %s could not be removed (%v); delete it by hand", b.old, unwrapPath(err)))
		}
	}
	if err := syncDir(st.dir); err != nil {
		problems = append(problems, fmt.Sprintf("syncing the folder failed (%v); the files may not survive a crash", err))
	}
	if len(problems) > 0 {
		// The results are in place; do not abort.
		return fmt.Errorf("export: results are in %s but %s", st.dir, strings.Join(problems, "; "))
	}
	return nil
}

// Abort closes and removes every temporary file and the folders OpenStage
// created if they are empty again. It is idempotent and does nothing after
// a successful Commit.
func (st *Stage) Abort() {
	if st.state == stageCommitted {
		return
	}
	for _, f := range st.files {
		if !f.closed {
			f.closed = true
			f.f.Close()
		}
		os.Remove(f.tmp)
	}
	if st.state == stageOpen {
		st.removeCreated()
	}
	st.state = stageAborted
}

// removeCreated removes the folders OpenStage created, deepest first; a
// folder that is not empty stays.
func (st *Stage) removeCreated() {
	for _, d := range st.created {
		if os.Remove(d) != nil {
			return
		}
	}
}

// stagedFile is the writer Create returns. The first write or close error
// sticks and makes Commit fail.
type stagedFile struct {
	name, tmp string
	f         *os.File
	err       error
	closed    bool
}

func (sf *stagedFile) Write(p []byte) (int, error) {
	if sf.closed {
		err := fmt.Errorf("export: write to %s after Close", sf.name)
		if sf.err == nil {
			sf.err = err
		}
		return 0, err
	}
	n, err := sf.f.Write(p)
	if err != nil {
		err = fmt.Errorf("export: writing %s: %w", sf.name, unwrapPath(err))
		if sf.err == nil {
			sf.err = err
		}
	}
	return n, err
}

// Close syncs the file to disk and closes it. A second Close does nothing.
func (sf *stagedFile) Close() error {
	if sf.closed {
		return nil
	}
	sf.closed = true
	serr := sf.f.Sync()
	cerr := sf.f.Close()
	if err := errors.Join(serr, cerr); err != nil {
		err = fmt.Errorf("export: finishing %s: %v", sf.name, err)
		if sf.err == nil {
			sf.err = err
		}
		return err
	}
	return nil
}

// WriteFileAtomic writes data to path so that readers see either the old
// content or the new one, never a part: it writes a hidden temporary file
// beside path (created with perm before the umask, as os.WriteFile does),
// syncs it, renames it over path and syncs the folder. On failure the
// temporary file is removed and path is unchanged. An existing path is
// replaced.
func WriteFileAtomic(path string, data []byte, perm fs.FileMode) error {
	dir, base := filepath.Split(path)
	if dir == "" {
		dir = "."
	}
	if base == "" {
		return fmt.Errorf("export: WriteFileAtomic path %q names a folder; give a file path", path)
	}
	f, tmp, err := createTemp(dir, "."+base+".tmp", perm)
	if err != nil {
		return fmt.Errorf("export: cannot write %s: %w; check the folder exists and is writable", path, unwrapPath(err))
	}
	_, werr := f.Write(data)
	serr := f.Sync()
	cerr := f.Close()
	if err := errors.Join(werr, serr, cerr); err != nil {
		os.Remove(tmp)
		return fmt.Errorf("export: writing %s failed (%v); the file is unchanged", path, err)
	}
	if err := os.Rename(tmp, path); err != nil {
		os.Remove(tmp)
		return fmt.Errorf("export: cannot replace %s: %w; the file is unchanged", path, unwrapPath(err))
	}
	if err := syncDir(dir); err != nil {
		return fmt.Errorf("export: %s was written but syncing its folder failed (%v); it may not survive a crash", path, err)
	}
	return nil
}

// createTemp creates a new file dir/prefix-XXXXXXXX (eight random hex
// digits) with O_EXCL. perm is applied before the umask, as for any new
// file, so the final file gets the user's usual permissions.
func createTemp(dir, prefix string, perm fs.FileMode) (*os.File, string, error) {
	var err error
	for try := 0; try < 100; try++ {
		path := filepath.Join(dir, prefix+"-"+randomSuffix())
		var f *os.File
		f, err = os.OpenFile(path, os.O_WRONLY|os.O_CREATE|os.O_EXCL, perm)
		if err == nil {
			return f, path, nil
		}
		if !errors.Is(err, fs.ErrExist) {
			return nil, "", err
		}
	}
	return nil, "", err
}

func randomSuffix() string {
	var b [4]byte
	rand.Read(b[:]) // never fails (crypto/rand documents it)
	return hex.EncodeToString(b[:])
}

func syncDir(dir string) error {
	d, err := os.Open(dir)
	if err != nil {
		return err
	}
	serr := d.Sync()
	cerr := d.Close()
	return errors.Join(serr, cerr)
}

// unwrapPath drops the *fs.PathError wrapper, whose path the messages name
// themselves, leaving "permission denied" and the like.
func unwrapPath(err error) error {
	var pe *fs.PathError
	if errors.As(err, &pe) {
		return pe.Err
	}
	var le *os.LinkError
	if errors.As(err, &le) {
		return le.Err
	}
	return err
}
