"""The first hour of a team with its own recogniser, with rehear commands only: a starter
configuration from their lexicon and in-domain text, a directory of unlabelled recogniser
messages labelled at the keyboard (driven here through a pseudo-terminal, stopped halfway and
resumed), the chain tuned on that corpus, and the tuned configuration running as the relay."""

from __future__ import annotations

import asyncio
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import orjson
import pytest

from stages.normalize.tokens import tokenize
from tests.integration.support import Collector, LogLines, publish_all
from tests.paths import ROOT, WORKSHOP
from tests.pty_driver import Terminal

pytestmark = pytest.mark.broker

_COUNT = 24  # messages to label: enough for a two-fold tune


def _rehear(*args: str, cwd: Path, env: dict[str, str]) -> str:
    done = subprocess.run([sys.executable, "-m", "relay.cli", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=300)
    assert done.returncode == 0, f"rehear {args[0]}: {done.stdout}\n{done.stderr}"
    return done.stdout


def _answer(term: Terminal, truth: dict[str, Any]) -> str:
    """Answer one message as a careful person would; returns how ("accepted", "typed")."""
    shown = term.expect(r'rehear: "(.*)"  \[')
    term.expect(r"\[q\] quit\n")
    reference = truth["reference"]
    if tokenize(shown.group(1)) == tokenize(reference):
        term.type("a")
        how = "accepted"
    else:
        term.type("e")
        term.expect("words said> ")
        term.type("\x15" + reference + "\r")  # Ctrl-U clears rehear's words
        how = "typed"
    proposed = term.expect(r"entities: (.*)\n")
    term.expect(r"\[q\] quit\n")
    wanted = sorted(e["id"] for e in truth["entities"])
    got = sorted(part.split(" (")[0] for part in proposed.group(1).split(", ")) if proposed.group(1) != "none" else []
    if got == wanted:
        term.type("y")
    elif not wanted:
        term.type("n")
    else:
        term.type("i")
        term.expect(r"comma-separated\)> ")
        term.type("\x15" + ", ".join(wanted) + "\r")
        term.expect(r"\[q\] quit\n")
        term.type("y")
    return how


def test_from_unlabelled_messages_to_a_tuned_running_relay(broker: Any, tmp_path: Path) -> None:
    env = dict(os.environ, PYTHONPATH=str(ROOT), MQTT_HOST=broker.host, MQTT_PORT=str(broker.port),
               TERM="dumb", INPUTRC="/dev/null")
    for name in ("lexicon.csv", "train.txt"):
        shutil.copy(WORKSHOP / name, tmp_path / name)
    lines = [json.loads(line) for line in (WORKSHOP / "corpus-whisper.jsonl").read_text().splitlines()[:_COUNT]]
    truth = {line["id"]: line for line in lines}
    (tmp_path / "logs").mkdir()
    (tmp_path / "logs/recogniser.jsonl").write_text("".join(json.dumps(line["message"]) + "\n" for line in lines))

    _rehear("starter", "--lexicon", "lexicon.csv", "--text", "train.txt", "-o", "relay.yaml", cwd=tmp_path, env=env)
    assert "valid (config hash" in _rehear("check", "relay.yaml", cwd=tmp_path, env=env)

    label = [sys.executable, "-m", "relay.cli", "label", "logs", "--config", "relay.yaml", "-o", "corpus.jsonl"]
    ways: list[str] = []
    term = Terminal(label, cwd=tmp_path, env=env)
    for number, ident in enumerate(list(truth)[:10]):
        term.expect(rf"\[{number + 1}/{_COUNT}\] {ident} ")
        if number == 3:
            term.expect(r"\[q\] quit\n")
            term.type("s")  # not sure what was said: skipped, and not asked again
            continue
        ways.append(_answer(term, truth[ident]))
    term.expect(r"\[q\] quit\n")
    term.type("q")
    status, screen = term.finish()
    assert status == 0, screen
    assert "labelled 9 " in screen and "skipped 1, 14 left for next time" in screen

    term = Terminal(label, cwd=tmp_path, env=env)  # resumes where the first session stopped
    rest = list(truth)[10:]
    for number, ident in enumerate(rest, start=1):
        term.expect(rf"\[{number}/{len(rest)}\] {ident} ")
        ways.append(_answer(term, truth[ident]))
    status, screen = term.finish()
    assert status == 0, screen
    assert {"accepted", "typed"} <= set(ways)  # both ways were exercised

    labelled = [json.loads(line) for line in (tmp_path / "corpus.jsonl").read_text().splitlines()]
    skipped = list(truth)[3]
    assert [line["id"] for line in labelled] == [i for i in truth if i != skipped]
    for line in labelled:
        assert tokenize(line["reference"]) == tokenize(truth[line["id"]]["reference"])
        assert sorted(e["id"] for e in line["entities"]) == sorted(e["id"] for e in truth[line["id"]]["entities"])
        assert line["message"] == truth[line["id"]]["message"]
    assert (tmp_path / "corpus.jsonl.skipped").read_text() == skipped + "\n"

    (tmp_path / "deploy").mkdir()
    _rehear("tune", "corpus.jsonl", "--config", "relay.yaml", "-o", "deploy/tuned.yaml", "--folds", "2",
            "--max-settings", "2", cwd=tmp_path, env=env)
    tuned = (tmp_path / "deploy/tuned.yaml").read_text()
    assert "lexicon: ../lexicon.csv" in tuned and str(tmp_path) not in tuned  # travels with its folder
    assert "# the MQTT broker the recogniser publishes to" in tuned  # the starter's comments survive
    _rehear("check", "tuned.yaml", cwd=tmp_path / "deploy", env=env)  # from another folder
    _run_and_clean_one(tmp_path, env, lines[0]["message"], broker)


def _run_and_clean_one(tmp_path: Path, env: dict[str, str], sample: dict[str, Any], broker: Any) -> None:
    async def scenario() -> None:
        async with Collector(broker, ["nlu/+/in"]) as down:
            process = subprocess.Popen([sys.executable, "-m", "relay.cli", "run", "deploy/tuned.yaml",
                                        "--metrics-port", "0"], cwd=tmp_path, env=env,
                                       stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
            assert process.stderr is not None
            log = LogLines(process.stderr)
            try:
                await asyncio.to_thread(log.wait_for, "rehear.service: connected", 60)
                await publish_all(broker, "asr/bench-2/nbest", [orjson.dumps(sample)])
                await down.wait_for(lambda got: bool(got), timeout=20)
            finally:
                process.terminate()
                await asyncio.to_thread(process.wait, 20)
                await asyncio.to_thread(log.rest)
                process.__exit__(None, None, None)
        cleaned = orjson.loads(down.received[0].payload)
        assert cleaned["id"] == sample["id"] and cleaned["decision"] in ("accept", "confirm", "reprompt")

    asyncio.run(scenario())
