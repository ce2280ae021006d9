"""Report on the workshop corpora: examples.recording.report run on this folder (or a file).

python -m examples.workshop.corpus_report
"""

from __future__ import annotations

import sys
from pathlib import Path

from examples.recording.report import main

HERE = Path(__file__).resolve().parent

if __name__ == "__main__":
    args = sys.argv[1:]
    if not args or args[0].startswith("-"):
        args = [str(HERE), *args]
    sys.exit(main(args))
