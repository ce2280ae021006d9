"""Record the workshop corpora: examples.recording.record run on this folder.

python -m examples.workshop.record_corpus --part main --recogniser whisper
"""

from __future__ import annotations

import sys
from pathlib import Path

from examples.recording.record import main

HERE = Path(__file__).resolve().parent

if __name__ == "__main__":
    sys.exit(main([str(HERE), *sys.argv[1:]]))
