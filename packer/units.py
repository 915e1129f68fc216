"""Units the CLI reads and prints, one rule each everywhere: shares (0..1 or a percent) and bytes (SI: 1 kB =
1,000 bytes)."""

from __future__ import annotations

import math

from danpack.runtime.errors import DanpackError


class UnitError(DanpackError):
    """A share or size option that does not read as one."""


def parse_share(text: str, option: str) -> float:
    """A share: a number in [0, 1] ("0.995") or a percent with its sign ("99.5%")."""
    raw = text.strip()
    percent = raw.endswith("%")
    try:
        value = float(raw[:-1] if percent else raw)
    except ValueError:
        raise UnitError(f"{option} {text!r} is not a number; give a share such as 0.995 or 99.5%") from None
    if not math.isfinite(value):
        raise UnitError(f"{option} {text!r} must be a finite number")
    if percent:
        value /= 100
    if not 0.0 <= value <= 1.0:
        hint = f" (did you mean {raw}%?)" if not percent and 1 < value <= 100 else ""
        raise UnitError(f"{option} {text!r} is a share: give a value between 0 and 1 (e.g. 0.995) or a percent "
                        f"with its sign (99.5%){hint}")
    return value


def format_bytes(n: float) -> str:
    """'42.0 kB', '83.4 MB': SI units, as the check's reports and bench print them."""
    for unit in ("B", "kB", "MB", "GB"):
        if abs(n) < 1000 or unit == "GB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n:.1f} GB"
