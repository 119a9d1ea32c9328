#!/usr/bin/env python
"""Rewrite the README's "Config reference" block from the output of ``corrpipe settings``.

Run after adding, removing or changing a setting; ``tests/unit/test_config.py`` fails until
the README matches the declarations.
"""

from __future__ import annotations

import re
import sys
from pathlib import Path

from corrpipe.config import config_reference

README = Path(__file__).resolve().parents[1] / "README.md"


def main() -> int:
    text = README.read_text()
    pattern = re.compile(r"(## Config reference\n.*?```toml\n)(.*?)(```)", re.S)
    if not pattern.search(text):
        print(f"{README}: no '## Config reference' section with a ```toml block", file=sys.stderr)
        return 1
    new = pattern.sub(lambda m: m.group(1) + config_reference().rstrip() + "\n" + m.group(3),
                      text, count=1)
    README.write_text(new)
    print("README config reference " + ("updated" if new != text else "already current"))
    return 0


if __name__ == "__main__":
    sys.exit(main())
