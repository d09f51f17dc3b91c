"""Files the front ends read and write: reports written safely, parameters loaded.

Writing.  A report replaces its file in one step: the text goes to a temporary
file beside it, is flushed to the disk, then renamed over the old name, so a
reader never sees half a report and a crash leaves the previous one whole.  What
is not a regular file (a device, a FIFO, a socket, a folder) is never replaced;
a symlink is followed and the file it points to is replaced, so the link stays;
an existing file keeps its mode, a new one gets the mode the umask gives.

Reading.  Parameters come from ``.npz`` (named arrays) or ``.npy`` (one array),
with pickled objects refused since unpickling runs code.  Dotted names in a
``.npz`` rebuild nested dicts: ``layer1.W`` is ``params["layer1"]["W"]``, the
same name the report prints; a level whose names are 0, 1, ..., k-1 becomes a
list (``layers.0.b`` is ``params["layers"][0]["b"]``).
"""
from __future__ import annotations

import os
import secrets
import stat
from pathlib import Path

import numpy as np

PARAMS_SUFFIXES = (".npz", ".npy")


class UnwritablePathError(OSError):
    """A report cannot be written to this path; the message says why in one sentence."""


class ParamsFileError(ValueError):
    """A parameters file cannot be used; the message says why in one sentence."""


# --- writing -------------------------------------------------------------------------------

def _kind(mode: int) -> str:
    """Plain words for a file type that is not a regular file."""
    for test, word in ((stat.S_ISDIR, "folder"), (stat.S_ISCHR, "character device"),
                       (stat.S_ISBLK, "block device"), (stat.S_ISFIFO, "FIFO"),
                       (stat.S_ISSOCK, "socket")):
        if test(mode):
            return word
    return "special file"


def resolve_target(path, what: str = "output") -> Path:
    """The file a write to `path` replaces: `path` itself, or where its symlinks lead.

    Parameters
    ----------
    path : str or os.PathLike
        The path given by the user.
    what : str
        The option or argument it came from, for messages (``"--json"``).

    Returns
    -------
    pathlib.Path
        An absolute path whose folder exists; the file there is absent or regular.

    Raises
    ------
    UnwritablePathError
        The folder is missing, the path is a folder or another non-regular file, or
        a symlink cannot be resolved.

    Examples
    --------
    >>> import tempfile
    >>> folder = tempfile.mkdtemp()
    >>> resolve_target(os.path.join(folder, "r.json")).name
    'r.json'
    """
    given = os.fspath(path)
    if not given:
        raise UnwritablePathError(f"{what}: expected a file name, got an empty path")
    target = Path(os.path.realpath(os.path.abspath(given)))
    try:
        st = os.stat(target)
    except FileNotFoundError:
        st = None
    except OSError as exc:   # a symlink loop, a name too long, ...
        raise UnwritablePathError(f"{what}: cannot use {given}: {exc.strerror}") from exc
    if st is not None and stat.S_ISDIR(st.st_mode):
        raise UnwritablePathError(f"{what}: {given} is a folder; give a file name in it")
    if st is not None and not stat.S_ISREG(st.st_mode):
        raise UnwritablePathError(f"{what}: {given} is a {_kind(st.st_mode)}, not a regular "
                                  "file; refusing to replace it")
    folder = target.parent
    if not folder.is_dir():
        shown = os.path.dirname(given) or "."
        raise UnwritablePathError(f"{what}: the folder {shown} does not exist")
    return target


def _open_temporary(folder: Path, name: str) -> tuple:
    """(fd, path) of a new file beside the target, created with mode 0o666 so that
    the umask decides a new report's mode, as for any file the user creates."""
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0)
    while True:
        tmp = folder / f".{name}.{secrets.token_hex(4)}.tmp"
        try:
            return os.open(tmp, flags, 0o666), tmp
        except FileExistsError:   # pragma: no cover - 32 random bits collided
            continue


def check_writable(path, what: str = "output", suffixes=None) -> Path:
    """Check, before any work, that a report can later be written to `path`.

    Parameters
    ----------
    path : str or os.PathLike
        The output path given by the user.
    what : str
        The option it came from, for messages.
    suffixes : collection of str, optional
        File name extensions accepted (``{".png", ".pdf"}``); None accepts any.

    Returns
    -------
    pathlib.Path
        The file a write will replace (see `resolve_target`).

    Raises
    ------
    UnwritablePathError
        See `resolve_target`; also an extension not in `suffixes`, or a folder in
        which no file can be created (permissions, a read-only file system).

    Examples
    --------
    >>> import tempfile
    >>> folder = tempfile.mkdtemp()
    >>> check_writable(os.path.join(folder, "fig.png"), "--plot", {".png"}).suffix
    '.png'
    """
    target = resolve_target(path, what)
    if suffixes is not None and target.suffix.lower() not in suffixes:
        raise UnwritablePathError(
            f"{what}: unknown file type {target.suffix or '(no extension)'!r} in "
            f"{os.fspath(path)}; expected one of {', '.join(sorted(suffixes))}")
    try:   # the one sure test, whoever we run as and whatever the file system
        fd, tmp = _open_temporary(target.parent, target.name)
    except OSError as exc:
        raise UnwritablePathError(f"{what}: cannot write in the folder {target.parent} "
                                  f"({exc.strerror})") from exc
    os.close(fd)
    os.unlink(tmp)
    return target


def _fsync_folder(folder: Path) -> None:
    """Make the rename itself durable; some systems cannot open a folder: skip there."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:   # pragma: no cover - e.g. Windows
        return
    try:
        os.fsync(fd)
    except OSError:   # pragma: no cover - a file system without folder fsync
        pass
    finally:
        os.close(fd)


def write_atomically(path, data, what: str = "report file") -> None:
    """Replace the file at `path` with `data` in one step (see the module docstring).

    Parameters
    ----------
    path : str or os.PathLike
        Where to write; a symlink is followed and its target replaced.
    data : str or bytes
        The content; str is written as UTF-8.
    what : str
        What is written, or the option naming the path, for messages.

    Raises
    ------
    UnwritablePathError
        `path` names a folder, a device, a FIFO or another non-regular file, or its
        folder does not exist.
    OSError
        The write itself failed (permissions, a full disk); the old file is kept.

    Examples
    --------
    >>> import tempfile
    >>> target = os.path.join(tempfile.mkdtemp(), "report.json")
    >>> write_atomically(target, "{}\\n")
    >>> open(target).read()
    '{}\\n'
    """
    target = resolve_target(path, what)
    payload = data.encode("utf-8") if isinstance(data, str) else bytes(data)
    try:
        old = os.stat(target)
    except FileNotFoundError:
        old = None
    fd, tmp = _open_temporary(target.parent, target.name)
    try:
        if old is not None:
            if hasattr(os, "fchmod"):
                os.fchmod(fd, stat.S_IMODE(old.st_mode))
            if hasattr(os, "fchown") and (old.st_uid, old.st_gid) != (os.getuid(), os.getgid()):
                try:   # only root may give a file away; others keep their own ownership
                    os.fchown(fd, old.st_uid, old.st_gid)
                except OSError:
                    pass
        with os.fdopen(fd, "wb") as fh:
            fd = None
            fh.write(payload)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        if fd is not None:
            os.close(fd)
        if os.path.lexists(tmp):
            os.unlink(tmp)
        raise
    _fsync_folder(target.parent)


# --- reading -------------------------------------------------------------------------------

def nest_dotted(flat: dict, source: str = "params") -> dict:
    """Rebuild nested dicts (and lists) from dotted names.

    Parameters
    ----------
    flat : dict
        ``{"layer1.W": array, "b": array}``.
    source : str
        Where the names came from, for messages.

    Returns
    -------
    dict
        ``{"layer1": {"W": array}, "b": array}``; a level whose names are exactly
        ``"0"``, ``"1"``, ..., ``"k-1"`` becomes a list.

    Raises
    ------
    ParamsFileError
        A name with an empty part (``"a..b"``), or a name that is both a value and
        a group (``"a"`` beside ``"a.b"``).

    Examples
    --------
    >>> nest_dotted({"layer1.W": 1.0, "layer1.b": 2.0, "scale": 3.0})
    {'layer1': {'W': 1.0, 'b': 2.0}, 'scale': 3.0}
    >>> nest_dotted({"layers.0.b": 1.0, "layers.1.b": 2.0})
    {'layers': [{'b': 1.0}, {'b': 2.0}]}
    """
    root: dict = {}
    for name, value in flat.items():
        parts = name.split(".")
        if not all(parts):
            raise ParamsFileError(f"{source}: the name {name!r} has an empty part; use names "
                                  "such as 'layer1.W' (dots separate levels)")
        level = root
        for depth, part in enumerate(parts[:-1]):
            nxt = level.setdefault(part, {})
            if not isinstance(nxt, dict):
                raise ParamsFileError(f"{source}: {'.'.join(parts[:depth + 1])!r} is both an "
                                      f"array and the group of {name!r}; rename one of them")
            level = nxt
        if parts[-1] in level:
            raise ParamsFileError(f"{source}: {name!r} is both an array and a group of arrays "
                                  f"(such as {name + '.' + next(iter(level[parts[-1]]))!r}); "
                                  "rename one of them")
        level[parts[-1]] = value
    return _lists_where_numbered(root)


def _lists_where_numbered(tree):
    if not isinstance(tree, dict):
        return tree
    children = {k: _lists_where_numbered(v) for k, v in tree.items()}
    if children and sorted(children) == sorted(str(i) for i in range(len(children))):
        return [children[str(i)] for i in range(len(children))]
    return children


def load_params(path, what: str = "--params"):
    """Parameters from a ``.npz`` (dict by name, dotted names nested) or ``.npy`` file.

    Parameters
    ----------
    path : str or os.PathLike
        The file.
    what : str
        The option it came from, for messages.

    Returns
    -------
    numpy.ndarray or dict
        The array of a ``.npy``; the (nested) dict of a ``.npz``.

    Raises
    ------
    ParamsFileError
        No such file, a folder or other non-regular file, another extension, pickled
        objects, an empty or unreadable file, clashing names, or arrays that do not
        hold real floating-point numbers (text, integers, complex numbers).

    Examples
    --------
    >>> import tempfile
    >>> target = os.path.join(tempfile.mkdtemp(), "p.npz")
    >>> np.savez(target, **{"layer1.W": np.ones((2, 2)), "b": np.zeros(2)})
    >>> sorted(load_params(target))
    ['b', 'layer1']
    """
    given = os.fspath(path)
    p = Path(given)
    if p.is_dir():
        raise ParamsFileError(f"{what}: {given} is a folder; expected a .npz or .npy file")
    if not p.exists():
        raise ParamsFileError(f"{what}: no such file: {given}")
    if not p.is_file():     # a FIFO would block the read below
        raise ParamsFileError(f"{what}: {given} is a {_kind(p.stat().st_mode)}; expected a "
                              ".npz or .npy file")
    if p.suffix.lower() not in PARAMS_SUFFIXES:
        raise ParamsFileError(f"{what}: expected a .npz or .npy file (or a PyTorch .pt), "
                              f"got {p.name}")
    # numpy takes any file without its own header for a pickle: say what the file is not.
    magic = {".npy": b"\x93NUMPY", ".npz": b"PK"}[p.suffix.lower()]
    try:
        with open(p, "rb") as handle:
            head = handle.read(len(magic))
    except OSError as exc:
        raise ParamsFileError(f"{what}: cannot read {given}: {exc.strerror or exc}") from exc
    if head != magic:
        raise ParamsFileError(f"{what}: {given} is not a numpy {p.suffix.lower()} file "
                              "(its header is missing); save arrays with numpy.save or "
                              "numpy.savez")
    single = p.suffix.lower() == ".npy"
    try:
        loaded = np.load(p, allow_pickle=False)
        if single:
            array = np.asarray(loaded)
        else:
            with loaded:
                flat = {key: loaded[key] for key in loaded.files}
    except ValueError as exc:
        if "pickle" in str(exc).lower():
            raise ParamsFileError(f"{what}: {given} holds pickled Python objects, which are "
                                  "refused (unpickling runs code); save plain arrays with "
                                  "numpy.savez") from exc
        raise ParamsFileError(f"{what}: cannot read {given}: {exc}") from exc
    except Exception as exc:  # noqa: BLE001 - a corrupt or foreign file: say so in one line
        raise ParamsFileError(f"{what}: cannot read {given}: {exc}") from exc
    if single:
        return _numbers(array, f"{what}: {given}: its array")
    if not flat:
        raise ParamsFileError(f"{what}: {given} holds no arrays")
    for key, array in flat.items():
        _numbers(array, f"{what}: {given}: {key!r}")
    return nest_dotted(flat, f"{what} {given}")


def _numbers(array: np.ndarray, which: str) -> np.ndarray:
    """`array` when it holds real floating-point numbers; else why not, naming `which`.
    The check would refuse the array too, but without naming the file it came from."""
    dtype = array.dtype
    if np.issubdtype(dtype, np.floating):
        return array
    if np.issubdtype(dtype, np.complexfloating):
        how = "only real parameters are checked: save real and imaginary parts apart"
    elif np.issubdtype(dtype, np.integer) or np.issubdtype(dtype, np.bool_):
        how = "save it with .astype(float)"
    else:
        how = "save numbers, not text, dates or records"
    raise ParamsFileError(f"{which} holds {dtype} entries; expected floating-point numbers "
                          f"({how})")
