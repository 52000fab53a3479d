"""``demaudit make-demo-archive``: an invented demo archive of any size that fits here."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from tqdm import tqdm

from demaudit.service.cli.exits import EXIT_BAD_INPUT, EXIT_CLEAN
from demaudit.service.settings import Settings

__all__ = ["add_make_demo_parser"]


def add_make_demo_parser(sub: Any) -> None:
    """``demaudit make-demo-archive --out DIR [--tiles CxR] [--pixels N] [--seed S]``."""
    make = sub.add_parser("make-demo-archive", help="generate an invented demo archive")
    make.add_argument("--out", type=Path, required=True, help="folder to write")
    make.add_argument("--tiles", default="6x6", help="test tiles, COLSxROWS (default 6x6)")
    make.add_argument("--pixels", type=int, default=160, help="test tile side in pixels")
    make.add_argument("--seed", type=int, default=1)
    make.add_argument("--force", action="store_true", help="write into a folder that is not empty")
    make.add_argument("--quiet", action="store_true", help="no progress bar")
    make.set_defaults(handler=make_demo_command)


def _error(message: str) -> int:
    print(f"demaudit: error: {message}", file=sys.stderr)
    return EXIT_BAD_INPUT


def make_demo_command(args: argparse.Namespace, settings: Settings) -> int:
    """Check the options and the folder, then write the archive with a progress bar."""
    from demaudit.workers.demo.archive import make_demo_archive
    from demaudit.workers.demo.options import DemoArchiveOptions

    try:
        cols, rows = (int(v) for v in args.tiles.lower().split("x"))
    except ValueError:
        return _error(f"--tiles must look like 8x8, got {args.tiles!r}")
    try:
        options = DemoArchiveOptions(tiles_x=cols, tiles_y=rows, pixels=args.pixels, seed=args.seed)
    except ValueError as exc:
        return _error(f"{exc} (--tiles {args.tiles}, --pixels {args.pixels}, --seed {args.seed})")
    out = Path(args.out)
    problem = _folder_problem(args, options, out)
    if problem:
        return _error(problem)
    bar = tqdm(total=None, unit="tile", desc="demo archive", disable=args.quiet, file=sys.stderr)

    def progress(done: int, total: int) -> None:
        bar.total = total
        bar.update(done - bar.n)

    try:
        spec_path = make_demo_archive(out, options, progress=progress)
    except OSError as exc:
        return _error(f"cannot write the demo archive into {out}: {exc}")
    finally:
        bar.close()
    print(f"demo archive written; job spec: {spec_path}")
    return EXIT_CLEAN


def _folder_problem(args: argparse.Namespace, options: Any, out: Path) -> str | None:
    """Why the archive cannot be written into out (not a folder, not empty, too big)."""
    from demaudit.workers.demo.archive import size_problem

    if out.exists() and not out.is_dir():
        return f"--out {out} exists and is not a folder"
    if out.is_dir() and any(out.iterdir()) and not args.force:
        return (
            f"--out {out} is not empty; choose a new or empty folder, or add --force to write "
            "the demo archive into it (files of an earlier demo archive there are replaced)"
        )
    problem = size_problem(options, out)
    if problem:
        return (
            f"--tiles {args.tiles} --pixels {args.pixels} is too big here: {problem}; "
            "use fewer --tiles or smaller --pixels"
        )
    return None
