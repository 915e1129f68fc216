"""Generate runtime/unicode_pinned.py: the code points unassigned in the pinned Unicode version.

    python -m danpack.runtime.gen_unicode             # rewrite runtime/unicode_pinned.py
    python -m danpack.runtime.gen_unicode --check     # exit 1 when the checked-in table differs

Source: the `unicodedata` module of the interpreter that runs it, whose tables MUST be the pinned version
(Python 3.11 carries Unicode 14.0.0); a code point is unassigned when its general category is Cn. The script
refuses to run under any other version, so the table never silently follows a newer or older Python.
"""

from __future__ import annotations

import sys
import unicodedata
from pathlib import Path

PINNED = "14.0.0"  # the Unicode version danpack's tokenizer is defined against
TARGET = Path(__file__).with_name("unicode_pinned.py")
PAIRS_PER_LINE = 6


def unassigned_ranges() -> list[tuple[int, int]]:
    """(first, last) runs of code points whose category is Cn in this interpreter's tables."""
    ranges, start = [], None
    for cp in range(0x110000):
        if unicodedata.category(chr(cp)) == "Cn":
            start = cp if start is None else start
        elif start is not None:
            ranges.append((start, cp - 1))
            start = None
    if start is not None:
        ranges.append((start, 0x10FFFF))
    return ranges


def render_module(ranges: list[tuple[int, int]]) -> str:
    """The text of unicode_pinned.py for these ranges."""
    lines = [f"(0x{a:05X}, 0x{b:05X})," for a, b in ranges]
    rows = ["    " + " ".join(lines[i : i + PAIRS_PER_LINE]) for i in range(0, len(lines), PAIRS_PER_LINE)]
    total = sum(b - a + 1 for a, b in ranges)
    return (
        '"""Code points unassigned (general category Cn) in Unicode ' + PINNED + ': GENERATED, do not edit.\n\n'
        "Made by `python -m danpack.runtime.gen_unicode` from the unicodedata tables of Python 3.11 (Unicode "
        + PINNED + ").\n"
        f"{len(ranges)} ranges, {total:,} code points (noncharacters and unassigned planes included).\n"
        '"""\n\n'
        f'UNICODE_VERSION = "{PINNED}"\n\n'
        "# (first, last) code points, inclusive, ascending, non-overlapping\n"
        "UNASSIGNED = (\n" + "\n".join(rows) + "\n)\n"
    )


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if unicodedata.unidata_version != PINNED:
        print(f"gen_unicode: this Python's Unicode tables are {unicodedata.unidata_version}, the pinned version is "
              f"{PINNED}; run it with Python 3.11", file=sys.stderr)
        return 2
    text = render_module(unassigned_ranges())
    if "--check" in argv:
        same = TARGET.read_text(encoding="utf-8") == text
        print(f"{TARGET}: {'matches' if same else 'DIFFERS from'} the tables of Unicode {PINNED}")
        return 0 if same else 1
    TARGET.write_text(text, encoding="utf-8")
    print(f"wrote {TARGET}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
