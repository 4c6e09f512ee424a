"""The ``plantation`` command: ``plantation <verb> [key=value ...]``.

Every job is a verb; its keys come from its file in ``configs/`` and are
overridden on the command line exactly as written there
(``plantation train region=mine network.members=5``). ``plantation --help``
lists the verbs; ``plantation <verb> --help`` says what a job does and lists
its keys with their comments and defaults. ``--debug`` (or
``PLANTATION_DEBUG=1``) prints the traceback of a refused input above its
one-line message.
"""

from __future__ import annotations

import argparse
import difflib
import sys
from collections.abc import Sequence
from pathlib import Path

from omegaconf import OmegaConf

from plantation import __version__
from plantation.cli.compose import CONFIG_DIR_ENV, compose_job, sources
from plantation.cli.errors import DEBUG_ENV, user_errors
from plantation.cli.helptext import comments, key_lines
from plantation.cli.verbs import VERBS
from plantation.errors import ConfigError

NEW_REGION = "new-region"
_NEW_REGION_SUMMARY = "inspect imagery (and labels) and write a commented region file the jobs accept"

USAGE = f"""usage: plantation [--debug] [--config-dir DIR] <verb> [key=value ...]
       plantation <verb> --help

Maps the year natural forest was converted to tree-crop plantation, pixel by
pixel, with probabilities and intervals. Outputs are probabilistic evidence to
be verified with high-resolution imagery and field checks.

verbs:
{{verbs}}

Keys override the job's config as key=value (region=mine, network.members=5,
region=path/to/my_region.yaml). Your own config files go in a folder laid out
like the package's configs/ (region/, network/, ...), given with --config-dir
or {CONFIG_DIR_ENV}.

A refused input (a bad file, a bad key) is reported in one line starting
`error:`, with exit status 1. --debug (or {DEBUG_ENV}=1) also prints the
traceback above it, for a bug report.

plantation {__version__}"""


def _verb_lines() -> str:
    rows = [(v.name, v.summary) for v in VERBS.values()] + [(NEW_REGION, _NEW_REGION_SUMMARY)]
    width = max(len(n) for n, _ in rows)
    return "\n".join(f"  {n:<{width}}  {s}" for n, s in rows)


def _split_options(argv: Sequence[str]) -> tuple[list[str], list[str], bool]:
    """Pull ``--config-dir DIR`` / ``--config-dir=DIR`` and ``-h``/``--help`` out of the arguments."""
    rest: list[str] = []
    dirs: list[str] = []
    want_help = False
    it = iter(argv)
    for a in it:
        if a in ("-h", "--help"):
            want_help = True
        elif a == "--config-dir":
            d = next(it, None)
            if d is None:
                raise ConfigError("--config-dir needs a folder")
            dirs.append(d)
        elif a.startswith("--config-dir="):
            dirs.append(a.split("=", 1)[1])
        else:
            rest.append(a)
    return rest, dirs, want_help


def verb_help(name: str, config_dirs: Sequence[str] = (), overrides: Sequence[str] = ()) -> str:
    """What a verb does, what it reads and writes, and its keys with comments and defaults."""
    verb = VERBS[name]
    src = sources(config_dirs)
    path = src.packaged / f"{verb.config}.yaml"
    header, _ = comments(path)
    cfg = compose_job(verb.config, overrides, verb=name, config_dirs=config_dirs)
    out = [f"plantation {name}: {verb.summary}", "", header.strip(), "", "keys (key=value; defaults as configured):"]
    out += key_lines(cfg, path)
    raw = OmegaConf.load(path)
    for entry in raw.get("defaults", []):
        if isinstance(entry, str) and entry != "_self_":  # this config extends another job's
            out += key_lines(cfg, src.packaged / f"{entry}.yaml")
    chosen = dict(o.split("=", 1) for o in overrides if "=" in o and "." not in o.split("=", 1)[0])
    groups = [(g, chosen.get(g, o)) for e in raw.get("defaults", []) if not isinstance(e, str) for g, o in e.items() if g != "hydra" and "@" not in g]
    for group, option in groups:
        options = src.options(group)
        extra = " or a path to a region file" if group == "region" else ""
        out += ["", f"{group} = {option}  (choose one of: {', '.join(options)}{extra}); its keys ({group}.<key>=value):"]
        file = Path(str(option)) if str(option).endswith((".yaml", ".yml")) else src.find(group, str(option))
        if file is not None:
            out += key_lines(cfg, file, prefix=f"{group}.")
    return "\n".join(out)


def _new_region(argv: Sequence[str]) -> None:
    from plantation.reference.starter import write

    p = argparse.ArgumentParser(prog=f"plantation {NEW_REGION}", description=_NEW_REGION_SUMMARY + ". Refuses, with the reason, where the files disagree.")
    p.add_argument("name", help="the region's name (used in output folder names)")
    p.add_argument(
        "--imagery",
        required=True,
        type=Path,
        help="a tile folder of dated GeoTIFFs, a folder of tile folders, of NetCDF/Zarr cubes, or of delivered scene folders (Landsat C2 L2, Sentinel-2 L2A; one folder of them per tile)",
    )
    p.add_argument("--labels", type=Path, default=None, help="reference points: CSV (x, y, label, onset_year), GeoPackage or GeoJSON")
    p.add_argument("--out", type=Path, default=None, help="the region file to write (default: <name>.yaml in the working directory)")
    p.add_argument("--force", action="store_true", help="replace an existing region file")
    args = p.parse_args(list(argv))
    dest = write(args.name, args.imagery, args.labels, args.out or Path(f"{args.name}.yaml"), overwrite=args.force)
    print(f"region file written to {dest}")
    print(f"check the lines marked CHECK, then: plantation survey region={dest}")


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command; return its exit status (0 done, 1 refused input, 2 usage)."""
    args = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in args
    args = [a for a in args if a != "--debug"]
    with user_errors(True if debug else None):
        if args and args[0] == NEW_REGION:
            _new_region(args[1:])
            return 0
        rest, dirs, want_help = _split_options(args)
        if rest and rest[0] == "help":
            rest, want_help = rest[1:], True
        if not rest:
            print(USAGE.format(verbs=_verb_lines()))
            return 0 if want_help else 2
        name, overrides = rest[0], rest[1:]
        if name == "--version":
            print(f"plantation {__version__}")
            return 0
        if name not in VERBS:
            close = difflib.get_close_matches(name, [*VERBS, NEW_REGION], n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise ConfigError(f"unknown verb {name!r}{hint}; `plantation --help` lists them")
        if want_help:
            print(verb_help(name, dirs, overrides))
            return 0
        verb = VERBS[name]
        verb.handler(compose_job(verb.config, overrides, verb=name, config_dirs=dirs))
    return 0
