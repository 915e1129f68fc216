"""`python -m bench.unicode_pin`: what the Unicode pin costs the tokenizer, as paired ratios.

Tokenizer.tokenize with the pin (runtime/tokenize.py `pin_unassigned`) against the same tokenizer with the pin
replaced by the identity, in interleaved rounds on the same machine state; medians of the rounds. ASCII text
never reaches the pin (one `str.isascii` test), so its ratio shows the fast path is untouched.
"""

from __future__ import annotations

import statistics
import time

from danpack.runtime import tokenize

TEXTS = {  # invented EV-charger comments
    "ascii": "the charger at bay 4 was not fast at all, took 2 hours",
    "accented": "Le chargeur était en panne, très décevant – café fermé aussi",
    "emoji": "charger ok 👍🏽 but slow ❤️ app crashed 😡😡",
    "cjk": "充电桩坏了，等了两个小时还是不能充电",
}
ROUNDS, CALLS = 21, 2000


def time_calls(fn, text: str) -> float:
    start = time.perf_counter()
    for _ in range(CALLS):
        fn(text)
    return (time.perf_counter() - start) / CALLS


def main() -> None:
    tok, pin = tokenize.Tokenizer(), tokenize.pin_unassigned
    print("| text | pinned (p50) | unpinned (p50) | ratio |\n|---|---|---|---|")
    try:
        for name, text in TEXTS.items():
            ratios, on, off = [], [], []
            for _ in range(ROUNDS):
                tokenize.pin_unassigned = pin
                a = time_calls(tok.tokenize, text)
                tokenize.pin_unassigned = lambda s: s
                b = time_calls(tok.tokenize, text)
                on.append(a), off.append(b), ratios.append(a / b)
            print(f"| {name} | {statistics.median(on) * 1e6:.2f} µs | {statistics.median(off) * 1e6:.2f} µs | "
                  f"{statistics.median(ratios):.2f}× |")
    finally:
        tokenize.pin_unassigned = pin


if __name__ == "__main__":
    main()
