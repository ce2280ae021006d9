"""Where the tests find the repository's files: always from this file, never from the working directory."""

from pathlib import Path

TESTS = Path(__file__).resolve().parent
ROOT = TESTS.parent
DATA = TESTS / "data"
EXAMPLES = ROOT / "examples"
WORKSHOP = EXAMPLES / "workshop"
