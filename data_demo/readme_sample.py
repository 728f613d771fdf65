"""Regenerate the README's sample output of the ship demo, so that it cannot go stale.

    python data_demo/readme_sample.py          # rewrite the block in README.md
    python data_demo/readme_sample.py --check  # exit 1 if README.md differs from a fresh run

The block lies between ``<!-- sample: ship -->`` and ``<!-- /sample -->``;
``tests/test_readme.py`` runs the check.
"""

from __future__ import annotations

import re
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
BLOCK = re.compile(r"(<!-- sample: ship -->\n```\n)(.*?)(```\n<!-- /sample -->)", re.S)


def sample_text():
    """What ``discover run configs/ship.toml`` prints, from the summary (without the caution line)."""
    import discover
    from discover.report import CAUTION, summary

    text = summary(discover.run(ROOT / "configs" / "ship.toml"))
    return "\n".join(line for line in text.splitlines() if line != CAUTION) + "\n"


def readme_block(text=None):
    text = README.read_text(encoding="utf-8") if text is None else text
    match = BLOCK.search(text)
    if match is None:
        raise SystemExit(f"{README}: no <!-- sample: ship --> block found.")
    return match


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    current = README.read_text(encoding="utf-8")
    fresh = sample_text()
    if "--check" in argv:
        same = readme_block(current).group(2) == fresh
        print("README sample is current." if same else "README sample differs from a fresh run.")
        return 0 if same else 1
    README.write_text(BLOCK.sub(lambda m: m.group(1) + fresh + m.group(3), current), encoding="utf-8")
    print(f"Rewrote the sample block of {README}.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
