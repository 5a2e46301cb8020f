"""What every command of the command line shares: its name, exit statuses and limits.
"""

from __future__ import annotations

import textwrap

PROG = "sillmark"


EXIT_OK = 0


EXIT_ERROR = 2


EXIT_INTERRUPTED = 130


def wrap(text: str) -> str:
    return textwrap.fill(text, width=78, break_on_hyphens=False)


#: Most water levels one ``sillmark stage`` call writes maps for.
MAX_LEVELS = 50


#: A level more than this many times the site's elevation range above its highest
#: ground is taken for a level in the wrong unit (unless --force).
WRONG_UNIT_FACTOR = 10.0


#: Flooded assets listed by name per level, and assets listed as next to flood.
LIST_FLOODED = 5


LIST_NEXT = 3


#: Distinct raised sills listed in the what-if summary.
LIST_SILLS = 10
