"""Check the system libraries that the PDF renderer needs; one clear line when one is missing.

Run by ``make demo`` and ``make test`` before anything else: ``python -m reportgen.syscheck``.
Exit 0 (silent) when weasyprint loads, 1 with the missing library named otherwise.
"""

from __future__ import annotations

import re
import sys

PACKAGES = (
    "Debian/Ubuntu: apt-get install libpango-1.0-0 libpangoft2-1.0-0 libharfbuzz0b "
    "fonts-dejavu-core; Fedora: dnf install pango harfbuzz dejavu-sans-fonts; "
    "macOS: brew install pango"
)


def main() -> int:
    try:
        import weasyprint  # noqa: F401
    except OSError as e:  # cffi's dlopen failure names the library it looked for
        found = re.search(r"'([^']+)'", str(e))
        name = found.group(1) if found else str(e).splitlines()[0]
        print(
            f"reportgen: the system library {name} is missing (needed for the PDF). "
            f"Install it: {PACKAGES}.",
            file=sys.stderr,
        )
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
