"""Output paths and new files that never destroy data.

A new trajectory file is written at a temporary name in its own folder and put
in place only when that is safe (:func:`install`):

* nothing at the path: a hard link, which fails when a file appeared there in
  the meantime (another run started at the same moment), so nothing is replaced;
* a file at the path and replacing it was asked for: the existing file's lock
  is taken first (the ``flock`` HDF5 holds on a file it has open for writing),
  so a file another run is writing is refused whatever the flags; only while
  that lock is held is the new file renamed over the old one.

No existing file is ever opened in a truncating mode, and the new file is
locked (by HDF5, or by :func:`hold_lock`) before its name appears, so a second
writer cannot replace it either. Paths are checked by :func:`path_text`.
"""
import errno
import fcntl
import os
import secrets
import unicodedata

from .validation import ConfigError

#: Attempts at replacing a file that keeps being replaced by others meanwhile.
INSTALL_ATTEMPTS = 5
#: errno values of a file system that cannot hard-link (then a reserved name is used).
_NO_LINK = {errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.ENOSYS, errno.EMLINK, errno.EXDEV}
#: errno values of a file system without flock.
_NO_LOCKS = {errno.ENOLCK, errno.ENOSYS, errno.ENOTSUP, errno.EOPNOTSUPP}


def path_text(path, what="output"):
    """``path`` as a str that names the same file for Python, the OS and HDF5.

    Accepts str, bytes and os.PathLike. Refuses control characters (a NUL cuts
    the name HDF5 sees short, so a check of one name would guard another),
    names the file system encoding cannot encode, and blank names.
    """
    try:
        text = os.fspath(path)
    except TypeError:
        raise ConfigError(f"{what} path = {_short(path)}: expected a file name (str or "
                          "pathlib.Path)") from None
    if isinstance(text, bytes):
        text = os.fsdecode(text)
    bad = [c for c in text if unicodedata.category(c) == "Cc"]
    if bad:
        raise ConfigError(f"{what} path = {_short(text)}: contains the control character "
                          f"{bad[0]!r}; expected a file name without control characters")
    try:
        os.fsencode(text)
    except UnicodeEncodeError:
        raise ConfigError(f"{what} path = {_short(text)}: cannot be encoded as a file name "
                          "(a lone surrogate?); expected a valid file name") from None
    if not text.strip():
        raise ConfigError(f"{what} path = {text!r}: expected a file name such as run.h5")
    return text


def _short(value):
    text = repr(value)
    return text if len(text) <= 100 else text[:97] + "..."


def temp_path(path):
    """A fresh hidden name in the folder of ``path`` for the file being prepared."""
    folder, name = os.path.split(os.path.abspath(path))
    return os.path.join(folder, f".{name}.{os.getpid()}-{secrets.token_hex(4)}.part")


def _try_lock(fd, path):
    """Take an exclusive flock on ``fd`` without waiting; False when another holder has it."""
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        return True
    except BlockingIOError:
        return False
    except OSError as exc:
        if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN):
            return False
        if exc.errno in _NO_LOCKS:
            raise ConfigError(f"output {path!r}: the file system does not support file locks, so "
                              "whether another run is writing this file cannot be told; expected "
                              "a file system with locks (or remove the file yourself)") from None
        raise


def in_use_error(path):
    return ConfigError(f"output {path!r}: the file is open for writing in another process (a run "
                       "still writing it); expected that run to end first, or another file "
                       "name; nothing was changed")


def exists_error(path):
    return ConfigError(f"output {path!r}: file exists; expected a new file name, or overwrite "
                       "(--overwrite) to replace it, or resume (--resume) to continue the run it "
                       "holds")


def hold_lock(path):
    """An open descriptor holding the flock of the (new) file ``path``, or None when its
    writer (HDF5) already holds that lock. Close it when the file is closed."""
    fd = os.open(path, os.O_RDONLY)
    try:
        if _try_lock(fd, path):
            return fd                     # HDF5 does not lock here: we hold the lock instead
    except BaseException:
        os.close(fd)
        raise
    os.close(fd)
    return None


def install(temp, path, replace=False):
    """Give the prepared (locked) file ``temp`` the name ``path``; ``temp`` is gone after.

    Without ``replace`` an existing ``path`` is refused (also one that appears
    while this runs). With ``replace`` an existing file is replaced only while
    holding its lock, so a file in use by another writer is refused. On a
    refusal ``temp`` is removed and ``path`` is untouched.

    Raises
    ------
    ConfigError
    """
    try:
        for _ in range(INSTALL_ATTEMPTS):
            if not os.path.lexists(path):
                try:
                    os.link(temp, path)
                except FileExistsError:
                    if not replace:
                        raise exists_error(path) from None
                    continue                      # appeared meanwhile: replace it under its lock
                except OSError as exc:
                    if exc.errno not in _NO_LINK:
                        raise
                    if _reserve_and_replace(temp, path, replace):
                        return
                    continue
                os.unlink(temp)
                return
            if not replace:
                raise exists_error(path)
            if _replace(temp, path):
                return
        raise ConfigError(f"output {path!r}: was replaced by other runs {INSTALL_ATTEMPTS} times "
                          "while this run tried to create it; expected one run per file")
    except BaseException:
        remove(temp)
        raise


def _reserve_and_replace(temp, path, replace):
    """Without hard links: claim ``path`` with an exclusive create, lock it, rename over it."""
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        if not replace:
            raise exists_error(path) from None
        return False
    try:
        return _rename_locked(temp, path, fd)
    finally:
        os.close(fd)


def _replace(temp, path):
    """Rename ``temp`` over the existing ``path`` while holding its lock.

    False when ``path`` vanished or changed before its lock was held (try again)."""
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK)   # never O_TRUNC
    except FileNotFoundError:
        return False
    except OSError as exc:
        raise ConfigError(f"output {path!r}: cannot be opened to take its lock ({exc.strerror}); "
                          "expected a file you can read, or another file name") from None
    try:
        return _rename_locked(temp, path, fd)
    finally:
        os.close(fd)


def _rename_locked(temp, path, fd):
    if not _try_lock(fd, path):
        raise in_use_error(path)
    held = os.fstat(fd)
    try:
        now = os.stat(path)
    except FileNotFoundError:
        return False
    if (held.st_dev, held.st_ino) != (now.st_dev, now.st_ino):
        return False                              # replaced while we took the lock
    os.rename(temp, path)
    return True


def remove(path):
    """Remove ``path`` if it exists."""
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass


def remove_if_same(path, identity):
    """Remove ``path`` if it is still the file ``identity`` = (st_dev, st_ino)."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return
    if (st.st_dev, st.st_ino) == tuple(identity):
        remove(path)
