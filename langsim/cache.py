"""Where compiled code lives: a user cache folder, never the installed package.

The folder is ``$LANGSIM_CACHE_DIR``, else ``$XDG_CACHE_HOME/langsim``, else
``~/.cache/langsim``. It holds

* ``numba/<fingerprint>/``: numba's compiled kernels of the package and of
  generated modules (the fingerprint hashes langsim's version and its kernel
  sources, so an edited or upgraded kernel never loads stale code);
* ``modules/``: generated kernel modules for expression terms, each named by
  the SHA-256 of its text and checked against it before it is run.

The folder must belong to the current user and be writable by nobody else
(it holds code this process runs); it is created with mode 0700. When it
cannot be used, a private temporary folder of this process takes its place
(made by :func:`tempfile.mkdtemp`, so nobody else can own it) and a warning
says so; nothing is ever read from a folder another user could write.

When ``NUMBA_CACHE_DIR`` is set, numba's own placement is respected for
compiled code.
"""
import hashlib
import os
import stat
import tempfile
import warnings

_PACKAGE_DIR = os.path.dirname(os.path.abspath(__file__))
_KERNEL_SOURCES = ("kernels/forces.py", "kernels/noise.py", "kernels/schemes.py",
                   "kernels/walls.py")
_resolved = {}


class CacheWarning(UserWarning):
    """The cache folder could not be used; compiled code will not persist."""


def configured_dir():
    """The cache folder the environment names (it may not exist yet)."""
    base = os.environ.get("LANGSIM_CACHE_DIR")
    if not base:
        xdg = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        base = os.path.join(xdg, "langsim")
    return os.path.abspath(base)


def private_dir_problem(path):
    """None when ``path`` is a folder of ours that nobody else can write, else what is wrong."""
    try:
        st = os.lstat(path)
    except OSError as exc:
        return f"cannot be read ({exc.strerror})"
    if stat.S_ISLNK(st.st_mode) or not stat.S_ISDIR(st.st_mode):
        return "is not a folder"
    if hasattr(os, "getuid") and st.st_uid != os.getuid():
        return f"belongs to another user (uid {st.st_uid})"
    if st.st_mode & (stat.S_IWGRP | stat.S_IWOTH):
        return f"is writable by others (mode {stat.S_IMODE(st.st_mode):o})"
    if not os.access(path, os.W_OK | os.X_OK):
        return "is not writable"
    return None


def _make_private(path):
    """Create ``path`` (and parents) with mode 0700 if missing; its problem or None."""
    try:
        os.makedirs(path, mode=0o700, exist_ok=True)
    except OSError as exc:
        return f"cannot be created ({exc.strerror})"
    return private_dir_problem(path)


def cache_dir():
    """The cache folder in use (created when needed; see the module notes)."""
    wanted = configured_dir()
    if wanted not in _resolved:
        path = wanted
        problem = _make_private(path)
        if problem is not None:
            fallback = tempfile.mkdtemp(prefix="langsim-cache-")
            warnings.warn(f"cache folder {path!r} {problem}; compiled kernels are kept in "
                          f"{fallback!r} for this process only (set LANGSIM_CACHE_DIR to a "
                          "folder of your own)", CacheWarning, stacklevel=2)
            path = fallback
        _resolved[wanted] = path
    return _resolved[wanted]


def subdir(name):
    """A private sub-folder of the cache folder."""
    path = os.path.join(cache_dir(), name)
    problem = _make_private(path)
    if problem is not None:
        raise OSError(f"cache folder {path!r} {problem}")
    return path


def fingerprint():
    """Hash of langsim's version and kernel sources (what compiled code depends on)."""
    from . import __version__
    h = hashlib.sha256(__version__.encode())
    for rel in _KERNEL_SOURCES:
        try:
            with open(os.path.join(_PACKAGE_DIR, rel), "rb") as fh:
                h.update(fh.read())
        except FileNotFoundError:
            h.update(b"-")
    return h.hexdigest()[:16]


def numba_dir():
    """Where numba keeps compiled code of langsim's kernels."""
    return subdir(os.path.join("numba", fingerprint()))


def install_numba_locator():
    """Make numba cache langsim's functions (and generated modules) under :func:`numba_dir`.

    Without it numba would write ``__pycache__`` folders inside the installed
    package, which a later editable install of the same package then shadows.
    """
    from numba.core import caching

    if getattr(caching, "_langsim_locator", None) is not None:
        return

    class LangsimCacheLocator(caching.UserProvidedCacheLocator):
        def __init__(self, py_func, py_file):
            self._py_file = py_file
            self._lineno = py_func.__code__.co_firstlineno
            self._cache_path = os.path.join(numba_dir(), self.get_suitable_cache_subpath(py_file))

        @classmethod
        def from_function(cls, py_func, py_file):
            from numba.core import config
            if config.CACHE_DIR:          # the user chose numba's cache folder: theirs wins
                return None
            path = os.path.abspath(py_file)
            modules = os.path.join(configured_dir(), "modules")
            if not (path.startswith(_PACKAGE_DIR + os.sep) or path.startswith(modules + os.sep)
                    or any(path.startswith(p + os.sep) for p in _resolved.values())):
                return None
            if not os.path.exists(py_file):
                return None
            self = cls(py_func, py_file)
            try:
                self.ensure_cache_path()
            except OSError:
                return None
            return self

    classes = caching.CacheImpl._locator_classes
    classes.insert(0, LangsimCacheLocator)
    caching._langsim_locator = LangsimCacheLocator
