package pipeline

import (
	"errors"
	"fmt"
	"io/fs"
	"strings"
	"syscall"
	"testing"
)

// Write failures that come from the machine (full disk, size limit,
// permissions) are bad input with a one-line message saying what to do,
// whether the cause is wrapped with %w or only named in the text (as the
// staged files of export report it); other failures stay what they are.
func TestOutputError(t *testing.T) {
	for _, c := range []struct {
		err  error
		want string
	}{
		{&fs.PathError{Op: "write", Path: "x", Err: syscall.ENOSPC}, "free space"},
		{fmt.Errorf("export: writing report.html: %v", syscall.ENOSPC), "free space"},
		{fmt.Errorf("report: writing the page: %w", fmt.Errorf("export: writing report.html: %v", syscall.EFBIG)), "ulimit -f"},
		{&fs.PathError{Op: "open", Path: "x", Err: syscall.EACCES}, "permissions"},
		{&fs.PathError{Op: "open", Path: "x", Err: syscall.EROFS}, "read-only"},
	} {
		err := outputError("out/points.ply", c.err)
		var ie *InputError
		if !errors.As(err, &ie) {
			t.Errorf("%v: got %T, want an *InputError", c.err, err)
			continue
		}
		if msg := err.Error(); !strings.Contains(msg, "out/points.ply") || !strings.Contains(msg, c.want) || strings.Contains(msg, "\n") {
			t.Errorf("%v: message %q, want one line naming the file and %q", c.err, msg, c.want)
		}
	}
	other := errors.New("export: /points/0/xyz/0 is NaN")
	err := outputError("out/reconstruction.json", other)
	var ie *InputError
	if errors.As(err, &ie) || !errors.Is(err, other) {
		t.Errorf("an internal failure became %T %v", err, err)
	}
}
