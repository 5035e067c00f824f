"""The example scenarios that ship with langsim: find, list and write them out to edit.

The scenarios are the ``configs/`` folder of the source tree (run configs, and sweep
files in ``configs/sweeps/``); an installed package carries them as data files in
``<prefix>/share/langsim/configs``. :func:`folder` finds whichever is there.
"""
import os
import sys
import tomllib
import sysconfig

from .validation import ConfigError

#: Where an installed package keeps its scenarios, below the installation's data folder.
DATA_SUBFOLDER = os.path.join("share", "langsim", "configs")


def folder():
    """The folder holding the scenarios (source tree first, then installed data)."""
    here = os.path.dirname(os.path.abspath(__file__))
    candidates = [os.path.join(os.path.dirname(here), "configs"),
                  os.path.join(sysconfig.get_path("data"), DATA_SUBFOLDER),
                  os.path.join(sys.prefix, DATA_SUBFOLDER)]
    try:
        candidates.append(os.path.join(sysconfig.get_path("data", f"{os.name}_user"), DATA_SUBFOLDER))
    except KeyError:
        pass
    for path in candidates:
        if os.path.isfile(os.path.join(path, "silica-trap.toml")):
            return path
    raise FileNotFoundError("the example scenarios are not installed (looked in "
                            + ", ".join(dict.fromkeys(candidates)) + ")")


def names():
    """Scenario names: ``"silica-trap"``, ..., ``"sweeps/stiffness-temperature"``."""
    root = folder()
    out = []
    for sub in ("", "sweeps"):
        path = os.path.join(root, sub)
        if os.path.isdir(path):
            out += [(f"{sub}/" if sub else "") + n[:-5] for n in sorted(os.listdir(path))
                    if n.endswith(".toml")]
    return out


def path_of(name):
    """The file of scenario ``name`` (with or without ``.toml``; a sweep's name may drop
    its ``sweeps/`` prefix); ConfigError listing the names for an unknown one."""
    import difflib
    known = names()
    key = name[:-5] if name.endswith(".toml") else name
    matches = [n for n in known if n == key or n == f"sweeps/{key}"]
    if not matches:
        close = difflib.get_close_matches(key, known, n=1)
        raise ConfigError(f"scenario {name!r}: no such scenario"
                          + (f" (did you mean {close[0]!r}?)" if close else "")
                          + f"; expected one of: {', '.join(known)}")
    return os.path.join(folder(), matches[0] + ".toml")


def summary(path):
    """The first comment line of a scenario file."""
    with open(path, encoding="utf-8") as fh:
        for line in fh:
            if line.startswith("#"):
                return line.lstrip("# ").rstrip()
    return ""


def command(name):
    """The langsim command that runs scenario ``name``: sweep, rate (an [escape] table) or run."""
    path = path_of(name)
    if os.path.dirname(path).endswith("sweeps"):
        return "sweep"
    with open(path, "rb") as fh:
        return "rate" if "escape" in tomllib.load(fh) else "run"


def listing():
    """The scenarios as text lines: name, the command that runs it, first comment line."""
    rows = [(n, command(n), summary(os.path.join(folder(), n + ".toml"))) for n in names()]
    width = max(len(n) for n, _, _ in rows)
    return [f"{n.ljust(width)}  {kind.ljust(5)}  {text}" for n, kind, text in rows]


def write(name, target=None, overwrite=False):
    """Copy scenario ``name`` to ``target`` (a file, or a folder to put it in; default: the
    current folder), never over an existing file unless ``overwrite``. Returns the path."""
    source = path_of(name)
    base = os.path.basename(source)
    if target is None:
        target = base
    from .safeio import path_text
    target = path_text(target, "scenario")
    if os.path.isdir(target):
        target = os.path.join(target, base)
    with open(source, encoding="utf-8") as fh:
        text = fh.read()
    try:
        with open(target, "w" if overwrite else "x", encoding="utf-8") as fh:
            fh.write(text)
    except FileExistsError:
        raise ConfigError(f"{target!r}: exists already; expected a new file name (-o PATH), "
                          "or --overwrite to replace it") from None
    except FileNotFoundError:
        raise ConfigError(f"{target!r}: folder {os.path.dirname(os.path.abspath(target))!r} does "
                          "not exist; expected an existing folder") from None
    return target


def add_parser(sub):
    p = sub.add_parser("scenarios", help="list the example scenarios, or write one out to edit",
                       description="Without NAME: list the example scenarios (run configs and "
                                   "sweep files). With NAME: write that scenario to NAME.toml in "
                                   "the current folder (or -o FILE/FOLDER), to edit and run.")
    p.add_argument("name", nargs="?", metavar="NAME", help="a scenario name from the list")
    p.add_argument("-o", "--output", metavar="PATH", help="file or folder to write to")
    p.add_argument("--overwrite", action="store_true", help="replace an existing file")
    p.set_defaults(func=cmd_scenarios)


def cmd_scenarios(args):
    if args.name is None:
        if args.output is not None:
            raise ConfigError("-o given without NAME: expected a scenario name to write")
        print("\n".join(listing()))
        print("\nwrite one out: langsim scenarios NAME [-o PATH]", file=sys.stderr)
        return 0
    path = write(args.name, args.output, args.overwrite)
    print(f"wrote {path}; run it with: langsim {command(args.name)} {path}", file=sys.stderr)
    return 0
