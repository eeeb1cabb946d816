"""Write docs/scripts.md from the manifest: ``python -m toolbox.docgen [--check] PATH``.

``--check`` fails when the file on disk differs from what the manifest gives, so the reference
page cannot drift from the scripts it describes.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .manifest import Param, describe_range, scripts


def _param_row(p: Param) -> str:
    spelling = "`DATASET`" if p.kind == "dataset" else f"`{p.option}`"
    allowed = p.kind
    if p.choices:
        allowed = " \\| ".join(f"`{c}`" for c in p.choices)
    elif p.min is not None or p.max is not None:
        allowed = ("integer" if p.kind == "integer" else "number") + describe_range(p)
    default = (
        "required"
        if p.kind == "dataset" or p.required
        else ("—" if p.default in (None, False) else f"`{p.default}`")
    )
    return f"| {spelling} | `{p.name}` | {allowed} | {default} | {p.help} |"


def render() -> str:
    """The whole reference page as markdown."""
    out = [
        "# Script reference",
        "",
        "Generated from `toolbox/manifest.toml` by `make docs`; do not edit by hand.",
        "Every script runs as `pairspread NAME ...`, as `python -m toolbox NAME ...` and from Python",
        'as `toolbox.NAME_WITH_UNDERSCORES(data, **params)` or `toolbox.run("NAME", **params)`.',
        "",
    ]
    for script in scripts().values():
        out += [f"## `{script.name}`", "", script.summary, ""]
        out += ["| option | Python name | allowed | default | what it does |", "|---|---|---|---|---|"]
        out += [_param_row(p) for p in script.params]
        if script.columns:
            out += ["", "Output columns, in this order:", "", "| column | meaning |", "|---|---|"]
            out += [f"| `{name}` | {meaning} |" for name, meaning in script.columns.items()]
        out.append("")
    return "\n".join(out)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m toolbox.docgen", description=__doc__)
    parser.add_argument("path", type=Path)
    parser.add_argument("--check", action="store_true", help="Fail if the file is out of date.")
    args = parser.parse_args(argv)
    text = render()
    if args.check:
        current = args.path.read_text("utf-8") if args.path.exists() else ""
        if current != text:
            print(f"{args.path} is out of date with the manifest; run `make docs`.", file=sys.stderr)
            return 1
        return 0
    args.path.parent.mkdir(parents=True, exist_ok=True)
    args.path.write_text(text, "utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
