package pipeline

import (
	"errors"
	"fmt"
	"strings"
	"syscall"
)

// outputError classifies a failure to write a result file. A full disk or
// quota, a file-size limit, a read-only or unwritable folder and a disk
// error come from the machine, not from a bug: they are an *InputError
// (exit code 3, like an output folder that cannot be written at all) with
// one line saying what to do. Any other error is wrapped as it is.
func outputError(path string, err error) error {
	for _, c := range []struct {
		errno syscall.Errno
		todo  string
	}{
		{syscall.ENOSPC, "free space on the disk or choose another output folder (-o)"},
		{syscall.EDQUOT, "free space within your disk quota or choose another output folder (-o)"},
		{syscall.EFBIG, "a file-size limit was reached (ulimit -f); raise it or choose another output folder (-o)"},
		{syscall.EROFS, "the file system is read-only; choose another output folder (-o)"},
		{syscall.EACCES, "choose an output folder you may write to (-o) or fix its permissions"},
		{syscall.EPERM, "choose an output folder you may write to (-o) or fix its permissions"},
		{syscall.EIO, "the disk reported an error; check it or choose another output folder (-o)"},
	} {
		// export's staged files report the cause with %v, which ends the
		// error chain: the system's text for the errno is matched too.
		if errors.Is(err, c.errno) || strings.Contains(err.Error(), c.errno.Error()) {
			return &InputError{fmt.Errorf("pipeline: cannot write %s: %w; no result was written — %s", path, c.errno, c.todo)}
		}
	}
	return fmt.Errorf("pipeline: writing %s: %w", path, err)
}
