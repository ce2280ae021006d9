"""Invented letters-only corpus: seeded random sentences over a small Zipf vocabulary."""
import random

rng = random.Random(20261202)
nouns = ["lamp", "kettle", "bench", "rope", "lantern", "barrow", "ladder", "anvil", "spool", "crate", "bucket", "chisel"]
verbs = ["fetch", "carry", "mend", "paint", "lift", "sweep", "stack", "polish"]
adjs = ["red", "old", "small", "heavy", "bright", "spare", "long"]
places = ["shed", "yard", "loft", "porch", "cellar", "barn"]
def zipf(words):
    return rng.choices(words, weights=[1 / (i + 1) for i in range(len(words))])[0]
lines = []
for _ in range(400):
    kind = rng.random()
    if kind < 0.4:
        s = f"please {zipf(verbs)} the {zipf(adjs)} {zipf(nouns)}"
    elif kind < 0.7:
        s = f"{zipf(verbs)} the {zipf(nouns)} to the {zipf(places)}"
    elif kind < 0.85:
        s = f"where is the {zipf(nouns)}"
    else:
        s = f"the {zipf(nouns)} is in the {zipf(places)} by the {zipf(nouns)}"
    if rng.random() < 0.3:
        s += " now"
    lines.append(s)
print("\n".join(lines))
