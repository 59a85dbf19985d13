"""``labkit lab``: JupyterLab (or, with ``--app``, a widgets-only Voila page) on a working folder."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path


def add_lab_parsers(subparsers: argparse._SubParsersAction) -> argparse.ArgumentParser:
    """Add the ``lab`` sub-command to the ``labkit`` parser; sets ``func`` to :func:`run_lab`."""
    from labkit.lab.workfolder import DEFAULT_FOLDER

    p = subparsers.add_parser(
        "lab", help="open the lab front end (planner, bench session, review) in JupyterLab",
        description="Start JupyterLab on the starter notebook of a working folder (demo bench, demo template, "
                    "simulated bench, local archive). Binds 127.0.0.1 with a random token unless --listen is given.")
    p.add_argument("--folder", type=Path, default=Path(DEFAULT_FOLDER),
                   help=f"working folder (default ./{DEFAULT_FOLDER}); created if missing, your edits are kept")
    p.add_argument("--port", type=int, default=None, help="TCP port (default: a free one)")
    p.add_argument("--listen", default=None, metavar="ADDR",
                   help="serve on this address so other machines can connect (prints a warning); "
                        "default 127.0.0.1, this machine only")
    p.add_argument("--no-browser", action="store_true", help="do not open a browser tab")
    p.add_argument("--app", action="store_true", help="app mode: serve only the widgets (Voila)")
    p.add_argument("--allow-root", action="store_true",
                   help="allow running as root (Jupyter refuses otherwise)")
    p.set_defaults(func=run_lab)
    return p


def run_lab(args: argparse.Namespace) -> int:
    """Prepare the working folder and run the server; 2 on a launch problem, else the server's exit code."""
    import os

    from labkit.lab.server import LaunchError, build_launch, launch_banner, run
    from labkit.lab.workfolder import prepare_folder

    allow_root = bool(args.allow_root)
    if hasattr(os, "geteuid") and os.geteuid() == 0 and not allow_root:
        if args.listen:
            print("labkit lab: running as root and serving other machines needs an explicit --allow-root "
                  "(better: run as an ordinary user)", file=sys.stderr)
            return 2
        # loopback only, with a token: allowed, but said (containers and fresh machines often run as root)
        print("labkit lab: WARNING: running as root; the server is reachable from this machine only. "
              "Prefer an ordinary user account.", file=sys.stderr)
        allow_root = True
    try:
        prepared = prepare_folder(args.folder)
        launch = build_launch(prepared.folder, prepared.notebook, mode="app" if args.app else "lab",
                              port=args.port, listen=args.listen, open_browser=not args.no_browser,
                              allow_root=allow_root)
    except (LaunchError, OSError) as exc:
        print(f"labkit lab: {exc}", file=sys.stderr)
        return 2
    print(launch_banner(launch, prepared.folder, prepared.notes), flush=True)
    return run(launch, cwd=prepared.folder)


def main(argv: list[str] | None = None) -> int:
    """Run ``lab`` on its own (``python -m labkit.cli.lab``), as ``labkit lab`` does once wired into the CLI."""
    parser = argparse.ArgumentParser(prog="labkit")
    add_lab_parsers(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(["lab", *(sys.argv[1:] if argv is None else argv)])
    return int(args.func(args))


if __name__ == "__main__":
    raise SystemExit(main())
