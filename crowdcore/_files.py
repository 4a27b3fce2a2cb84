"""Atomic file writes: a temp file in the same folder, fsync, then a rename over the target,
so a failed or interrupted write always leaves the old file intact."""
import os
import tempfile


def atomic_write(path, data):
    """Write bytes to path atomically; keeps the old file's mode (else 0644)."""
    path = os.fspath(path)
    fd, tmp = tempfile.mkstemp(dir=os.path.dirname(os.path.abspath(path)), prefix=f".{os.path.basename(path)}.",
                               suffix=".part")
    try:
        try:  # mkstemp makes 0600 files
            mode = os.stat(path).st_mode & 0o777
        except OSError:
            mode = 0o644
        os.chmod(tmp, mode)
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
