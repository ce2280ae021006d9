"""Phone costs learned from a recogniser, kept in a small JSON file: read by the lexicon stage
(setting ``match.costs``) and written by `rehear learn-costs`.

```
{"format": "rehear-phone-costs", "version": 1,
 "phones": ["AA", "AE", ...],    the 39 ARPAbet phones, the order of every row and column
 "substitution": [[...], ...],   [said][heard]: cost of a said phone heard as another, in [0, 1], 0 on the diagonal
 "deletion": [...],              [said]: cost of a said phone that was not heard, in [0, 1]
 "insertion": [...],             [heard]: cost of a heard phone that stands for nothing said, in [0, 1]
 "provenance": {...}}            what the costs were fitted on, free-form (rehear writes corpus, counts, date)
```

Rows are what was said and columns what was heard, the way a confusion table is read; the
aligner's ``CostModel`` holds the transpose (heard first, see ``phonetics.CostModel``).
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

from relay.core.errors import ConfigError
from relay.core.files import write_atomically
from stages.lexicon.sound.phonetics import PHONES, CostModel

__all__ = ["FORMAT", "VERSION", "read_costs", "write_costs"]

FORMAT = "rehear-phone-costs"
VERSION = 1
_KEYS = ("format", "version", "phones", "substitution", "deletion", "insertion", "provenance")
_MOST_PROBLEMS = 12  # a file that is wrong everywhere gets a readable message, not 1,600 lines


def read_costs(path: Path) -> CostModel:
    """The cost model a cost file holds; ConfigError naming the file and each problem otherwise."""
    data, problems = _parse(path)
    if data is not None:
        problems += _check(data)
    if problems or data is None:  # no data comes with a problem
        shown = problems[:_MOST_PROBLEMS]
        if len(problems) > len(shown):
            shown.append(f"... and {len(problems) - len(shown)} more")
        raise ConfigError(f"Phone cost file {path} is invalid", [f"{path}: {line}" for line in shown])
    order = [data["phones"].index(phone) for phone in PHONES]
    said_heard = data["substitution"]
    # The file's rows are said phones; the aligner's first index is the heard phone.
    substitution = tuple(tuple(float(said_heard[s][h]) for s in order) for h in order)
    return CostModel(substitution, tuple(float(data["insertion"][i]) for i in order),
                     tuple(float(data["deletion"][i]) for i in order))


def write_costs(path: Path, model: CostModel, provenance: dict[str, Any]) -> None:
    """Write ``model`` with its provenance, one matrix row per line, atomically (temporary file, then
    rename) and readable as a plain ``open()`` would leave it (the umask's permissions)."""
    said_heard = [[model.substitution[h][s] for h in range(len(PHONES))] for s in range(len(PHONES))]
    lines = ["{", f' "format": {json.dumps(FORMAT)},', f' "version": {VERSION},',
             f' "phones": {json.dumps(list(PHONES))},', ' "substitution": [']
    lines += [f"  {json.dumps(row)}{',' if i < len(said_heard) - 1 else ''}" for i, row in enumerate(said_heard)]
    lines += [" ],", f' "deletion": {json.dumps(list(model.deletion))},',
              f' "insertion": {json.dumps(list(model.insertion))},',
              f' "provenance": {json.dumps(provenance, indent=1, sort_keys=True)}', "}", ""]
    write_atomically(Path(path), "\n".join(lines).encode("utf-8"))


def _parse(path: Path) -> tuple[dict[str, Any] | None, list[str]]:
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        return None, [f"cannot be read ({exc.strerror or exc})"]
    except UnicodeDecodeError:
        return None, ["is not UTF-8 text"]
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        return None, [f"line {exc.lineno} column {exc.colno}: not valid JSON ({exc.msg})"]
    if not isinstance(data, dict):
        return None, [f"expected a JSON object with {', '.join(_KEYS)}; got {type(data).__name__}"]
    return data, []


def _check(data: dict[str, Any]) -> list[str]:
    problems = [f"unknown key {key!r} (valid: {', '.join(_KEYS)})" for key in data if key not in _KEYS]
    problems += [f"missing key {key!r}" for key in _KEYS if key not in data and key != "provenance"]
    if problems:
        return problems
    if data["format"] != FORMAT or data["version"] != VERSION:
        return [f"format {data['format']!r} version {data['version']!r}: this rehear reads {FORMAT!r} version "
                f"{VERSION}"]
    phones = data["phones"]
    if not isinstance(phones, list) or sorted(map(str, phones)) != sorted(PHONES):
        given = set(map(str, phones)) if isinstance(phones, list) else set()
        unknown = sorted(given - set(PHONES))
        lacking = sorted(set(PHONES) - given)
        return [f"phones: must list each of the {len(PHONES)} ARPAbet phones once, without stress"
                + (f"; unknown {', '.join(unknown)}" if unknown else "")
                + (f"; missing {', '.join(lacking)}" if lacking else "")]
    size = len(PHONES)
    problems += _numbers("deletion", data["deletion"], phones)
    problems += _numbers("insertion", data["insertion"], phones)
    rows = data["substitution"]
    if not isinstance(rows, list) or len(rows) != size:
        return problems + [f"substitution: must be {size} rows of {size} costs, one row per phone in 'phones'"]
    for s, row in enumerate(rows):
        found = _numbers(f"substitution[{s}] ({phones[s]} said)", row, phones)
        problems += found
        if not found and row[s] != 0:
            problems.append(f"substitution[{s}][{s}]: {phones[s]} heard as itself must cost 0, got {row[s]}")
    return problems


def _numbers(name: str, values: Any, phones: list[str]) -> list[str]:
    if not isinstance(values, list) or len(values) != len(phones):
        return [f"{name}: must be a list of {len(phones)} costs, one per phone in 'phones'"]
    problems = []
    for i, value in enumerate(values):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            problems.append(f"{name}[{i}] ({phones[i]}): must be a number, got {value!r}")
        elif not 0.0 <= value <= 1.0:
            problems.append(f"{name}[{i}] ({phones[i]}): must lie in [0, 1], got {value}")
    return problems
