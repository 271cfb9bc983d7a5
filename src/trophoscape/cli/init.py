"""``trophoscape init``: a commented scenario template for a user's own patch file.
"""

from __future__ import annotations

from pathlib import Path

from ..workflows.template import write_template

__all__ = ["add_parser"]

def add_parser(sub) -> None:
    import argparse

    p = sub.add_parser("init", help="write a commented scenario for your own patch file",
                       description="Write a commented scenario template next to a patch "
                                   "file, with the id field guessed and the attributes listed.",
                       epilog="example:\n  trophoscape init my-valley/\n"
                              "  trophoscape check my-valley/scenario.toml",
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("folder", type=Path, help="folder holding the patch file")
    p.add_argument("--patches", type=Path, help="the patch file, if the folder has several")
    p.add_argument("--name", default="scenario.toml", help="file name of the scenario")
    p.add_argument("--force", action="store_true", help="replace an existing scenario")
    p.set_defaults(handler=_handler)


def _handler(args) -> int:
    target = write_template(args.folder, patches=args.patches, name=args.name,
                            force=args.force)
    print(f"wrote {target}; check it with: trophoscape check {target}")
    return 0
