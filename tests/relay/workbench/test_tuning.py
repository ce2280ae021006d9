from __future__ import annotations

import dataclasses
import json
import os
import pathlib
import random
from pathlib import Path
from types import SimpleNamespace
from typing import Any, ClassVar

import numpy as np
import pytest
from pydantic import BaseModel, ConfigDict, Field

import relay.workbench.tune as tune_workflow
import relay.workbench.tuning
from relay.cli import tune as tune_command
from relay.core.config import build_chain, load_config
from relay.core.registry import Registry
from relay.core.setting_names import AcceptsOldNames, value_fields
from relay.core.utterance import Utterance
from relay.core.yamlsource import load_yaml
from relay.workbench.corpus import read_corpus
from relay.workbench.evaluate import Outcome
from relay.workbench.tuning import (
    DEFAULT_GATE_GRID,
    DEFAULT_SPACE,
    Choice,
    RecordedFeatures,
    cross_validate,
    expand_space,
    fit,
    gate_accepts,
    gate_settings,
    held_out_summary,
    make_folds,
)
from relay.workbench.variants import VariantBuilder, apply_overrides, config_from_dict, with_overrides
from stages.gate.features import GateFeatures
from stages.gate.rules import decide
from stages.gate.settings import GateSettings
from stages.lexicon.settings import LexiconSettings
from stages.lm.rescore import LmRescoreSettings
from stages.normalize.stage import NormalizeSettings
from tests.plain_stage import PlainStage
from tests.relay.workbench.corpus_fixtures import write_config, write_corpus


def test_folds_are_disjoint_cover_everything_and_follow_the_seed() -> None:
    folds = make_folds(103, 5, seed=1)
    joined = np.concatenate(folds)
    assert sorted(joined.tolist()) == list(range(103))
    assert len(set(joined.tolist())) == 103
    assert [len(f) for f in folds] == [21, 21, 21, 20, 20]
    assert all(np.array_equal(a, b) for a, b in zip(folds, make_folds(103, 5, seed=1)))
    assert not all(np.array_equal(a, b) for a, b in zip(folds, make_folds(103, 5, seed=2)))
    with pytest.raises(ValueError, match="folds"):
        make_folds(3, 5, seed=1)


def test_cross_validation_fits_on_training_folds_and_scores_on_the_held_out_one_only() -> None:
    folds = make_folds(50, 5, seed=3)
    fitted: list[np.ndarray] = []
    scored: list[np.ndarray] = []

    def fit_on(train: np.ndarray) -> Choice:
        fitted.append(train)
        return Choice(setting=0, gate={})

    def score_on(choice: Choice, test: np.ndarray) -> int:
        scored.append(test)
        return len(test)

    results = cross_validate(folds, fit_on, score_on)
    assert len(results) == len(fitted) == len(scored) == len(folds) == 5
    for train, test, fold in zip(fitted, scored, folds):
        assert np.array_equal(test, fold)
        assert not set(train.tolist()) & set(test.tolist())
        assert len(train) + len(test) == 50
    # Every utterance is scored exactly once, always by a choice fitted without it.
    assert sorted(np.concatenate(scored).tolist()) == list(range(50))


def _features(rng: random.Random) -> GateFeatures:
    corrected = rng.random() < 0.3
    return GateFeatures(
        posterior=rng.random(), margin=rng.random() * 0.6,
        weakest_entity=None if rng.random() < 0.3 else rng.random(),
        corrected=corrected, correction_score=rng.random() if corrected else None,
        lm_per_word=None if rng.random() < 0.2 else -rng.uniform(1, 9),
        safety_rule="word:start" if rng.random() < 0.1 else None, empty=rng.random() < 0.02,
    )


def _outcome(i: int, features: GateFeatures, right: bool) -> Outcome:
    """An accepted utterance with one entity, found (and its words right) or missed."""
    return Outcome(id=str(i), tags={}, ref_words=5, errors_first=2, errors_oracle=1, errors_relay=0 if right else 2,
                   reference_ids=frozenset({"a"}), found={"a": "machine"} if right else {}, decision="accept",
                   gate=features, stage_us={}, total_us=0.0)


def _outcomes(count: int, seed: int, *, informative: bool = True) -> list[Outcome]:
    rng = random.Random(seed)
    outcomes = []
    for i in range(count):
        features = _features(rng)
        # Right entities are likelier when the gate's scores are high, as with a real chain.
        right = rng.random() < (features.posterior if informative else 0.5)
        outcomes.append(_outcome(i, features, right))
    return outcomes


def test_vectorised_sweep_agrees_with_the_gate_decision() -> None:
    outcomes = _outcomes(300, seed=5)
    features = RecordedFeatures(outcomes)
    rng = np.random.default_rng(0)
    grid = np.column_stack([rng.choice(v, 40) for v in DEFAULT_GATE_GRID.values()])
    for min_lm in (None, -5.0):
        accepts = gate_accepts(features, grid, min_lm)
        for row, thresholds in enumerate(grid):
            gate = dict(zip(DEFAULT_GATE_GRID, thresholds.tolist()))
            gate["accept_without_entity"] = bool(gate["accept_without_entity"])
            settings = gate_settings(GateSettings(), {**gate, "min_lm_per_word": min_lm, "confidence": None})
            expected = [decide(o.gate, settings)[0] == "accept" for o in outcomes if o.gate is not None]
            assert accepts[row].tolist() == expected


def test_fit_keeps_within_the_clarification_budget_and_cuts_wrong_accepts() -> None:
    outcomes = _outcomes(400, seed=11)
    recorded = [RecordedFeatures(outcomes)]
    train = np.arange(400)
    everything = Choice(0, {"accept_posterior": 0.0, "accept_margin": 0.0, "accept_entity": 0.0,
                            "accept_correction": 0.0, "accept_without_entity": True, "min_lm_per_word": None,
                            "confidence": None})
    baseline = held_out_summary([outcomes], [_result(everything, train)], GateSettings(safety_words=[]))
    choice = fit(recorded, train, max_clarify=0.4)
    tuned = held_out_summary([outcomes], [_result(choice, train)], GateSettings())
    # The budget bounds what the gate asks from doubt; the safety rule's share comes on top.
    assert tuned.asked_doubt <= 0.4 + 1e-9
    assert tuned.asked_policy == pytest.approx(sum(o.gate.safety_rule is not None for o in outcomes  # type: ignore[union-attr]
                                                   if o.gate is not None) / len(outcomes))
    assert tuned.wrong_accept_rate < baseline.wrong_accept_rate - 0.05


def test_fewer_slot_errors_come_before_fewer_word_errors() -> None:
    # Two settings the gate makes equally safe: the second writes every word right but puts a
    # wrong entity into five utterances (the gate asks those back), the first leaves two word
    # errors in each utterance and every entity right. The job is the entities: the first wins.
    def run(inserted: int, word_errors: int) -> list[Outcome]:
        outcomes = []
        for i in range(50):
            wrong = i < inserted
            features = GateFeatures(posterior=0.1 if wrong else 0.9, margin=0.5, weakest_entity=0.9, corrected=False,
                                    correction_score=None, lm_per_word=None, safety_rule=None, empty=False)
            outcomes.append(dataclasses.replace(
                _outcome(i, features, True), errors_relay=word_errors,
                found={"a": "machine", "b": "machine"} if wrong else {"a": "machine"}))
        return outcomes

    recorded = [RecordedFeatures(run(0, 2)), RecordedFeatures(run(5, 0))]
    choice = fit(recorded, np.arange(50), max_clarify=0.3, learn=False)
    assert choice.setting == 0
    # Alone, the second setting is still chosen when it makes no slot error either.
    assert fit([RecordedFeatures(run(0, 2)), RecordedFeatures(run(0, 0))], np.arange(50),
               max_clarify=0.3, learn=False).setting == 1


def _hidden_cue_outcomes(count: int, seed: int) -> list[Outcome]:
    """Right or wrong by a cue the hand thresholds cannot see (unknown words in the finished
    text), while the posterior says nothing: only the learned confidence can tell them apart."""
    rng = random.Random(seed)
    outcomes = []
    for i in range(count):
        features = dataclasses.replace(_features(rng), text_oov=rng.randint(0, 3), safety_rule=None, empty=False,
                                       text_lm_per_word=-rng.uniform(2, 8))
        right = rng.random() < (0.95 if features.text_oov == 0 else 0.3)
        outcomes.append(_outcome(i, features, right))
    return outcomes


def test_learned_confidence_beats_hand_thresholds_on_held_out_folds_when_the_cue_is_hidden() -> None:
    outcomes = _hidden_cue_outcomes(500, seed=3)
    recorded = [RecordedFeatures(outcomes)]
    base = GateSettings(lm_model=Path("domain.arpa"), safety_words=[])
    folds = make_folds(500, 5, seed=1)
    summaries = {}
    for learn in (False, True):
        results = cross_validate(folds, lambda train, learn=learn: fit(recorded, train, max_clarify=0.4, learn=learn),
                                 lambda choice, test: choice)
        summaries[learn] = held_out_summary([outcomes], results, base)
        assert all((r.choice.gate.get("confidence") is not None) == learn for r in results)
    assert summaries[True].wrong_accept_rate < summaries[False].wrong_accept_rate - 0.1
    assert summaries[True].clarify_rate <= 0.45  # fitted under a 40% budget, scored on other folds


def test_the_learned_sweep_agrees_with_the_gate_decision() -> None:
    outcomes = _hidden_cue_outcomes(200, seed=8)
    train = np.arange(200)
    choice = fit([RecordedFeatures(outcomes)], train, max_clarify=0.3)
    assert choice.gate["confidence"] is not None
    settings = gate_settings(GateSettings(lm_model=Path("domain.arpa"), safety_words=[]), choice.gate)
    accepted = [decide(o.gate, settings)[0] == "accept" for o in outcomes if o.gate is not None]
    # Under the budget on the utterances it was fitted on, as the sweep promised.
    asked_back = 1 - sum(accepted) / len(accepted)
    assert asked_back <= 0.3 + 1e-9


def _result(choice: Choice, index: np.ndarray) -> Any:
    return cross_validate([index, np.array([], dtype=int)], lambda train: choice,
                          lambda c, test: None)[0]


def test_held_out_summary_uses_only_each_folds_test_utterances() -> None:
    outcomes = _outcomes(60, seed=2)
    folds = make_folds(60, 3, seed=9)
    results = cross_validate(folds, lambda train: fit([RecordedFeatures([outcomes[i] for i in range(60)])], train,
                                                      max_clarify=0.3), lambda choice, test: None)
    summary = held_out_summary([outcomes], results, GateSettings())
    assert summary.utterances == 60
    only_first = held_out_summary([outcomes], results[:1], GateSettings())
    assert only_first.utterances == len(folds[0])


def test_space_expands_and_samples_with_a_fixed_seed() -> None:
    space = {"lm_rescore": {"lm_weight": [0.1, 0.2, 0.3]}, "lexicon": {"min_score": [0.5, 0.7]}}
    settings = expand_space(space, max_settings=10, seed=1)
    assert len(settings) == 6
    assert {"lm_rescore": {"lm_weight": 0.3}, "lexicon": {"min_score": 0.5}} in settings
    assert expand_space(space, max_settings=4, seed=1) == expand_space(space, max_settings=4, seed=1)
    assert len(expand_space(space, max_settings=4, seed=1)) == 4
    assert expand_space({}, max_settings=4, seed=1) == [{}]


class CountingSettings(BaseModel):
    model_config = ConfigDict(extra="forbid")
    bias: float = 0.0


class CountingStage(PlainStage):
    name: ClassVar[str] = "counting"
    Settings: ClassVar[type[BaseModel]] = CountingSettings
    needs: ClassVar[frozenset[str]] = frozenset({"posterior"})
    loads: ClassVar[int] = 0

    def load(self) -> None:
        CountingStage.loads += 1

    def process(self, utterance: Utterance) -> Utterance:
        return utterance


def test_variant_builder_loads_each_distinct_stage_setting_once(tmp_path: Path) -> None:
    registry = Registry(plugins=False)
    registry.register(CountingStage)  # type: ignore[arg-type]
    loaded = config_from_dict({"stages": ["normalize", {"counting": {"bias": 0.1}}, "gate"]}, base_dir=tmp_path)
    builder = VariantBuilder(loaded, registry=registry)
    CountingStage.loads = 0
    first = builder.chain({"counting": {"bias": 0.5}})
    second = builder.chain({"counting": {"bias": 0.5}})
    third = builder.chain({"counting": {"bias": 0.9}})
    assert CountingStage.loads == 2
    assert first.stages[0] is third.stages[0]  # normalize did not change: shared
    assert first.stages[1] is second.stages[1] and first.stages[1] is not third.stages[1]
    assert builder.settings_fields("counting") == {"bias"}
    assert builder.settings_fields("no_such_stage") == set()


class Shift(BaseModel):
    model_config = ConfigDict(extra="forbid")
    by: float = 0.0
    floor: float = 0.0


class GroupedSettings(AcceptsOldNames):
    old_names = {"shift_by": "shift.by"}
    bias: float = 0.0
    shift: Shift = Field(default_factory=Shift)


class GroupedStage(CountingStage):
    name: ClassVar[str] = "grouped"
    Settings: ClassVar[type[BaseModel]] = GroupedSettings


def test_overrides_address_grouped_settings_by_dotted_name(tmp_path: Path) -> None:
    registry = Registry(plugins=False)
    registry.register(GroupedStage)  # type: ignore[arg-type]
    # Written with the old flat name: an override of its new place replaces it, and keeps the rest of the group.
    written = {"stages": ["normalize", {"grouped": {"shift_by": 0.1, "shift": {"floor": 0.2}}}, "gate"]}
    builder = VariantBuilder(config_from_dict(written, base_dir=tmp_path), registry=registry)
    assert builder.settings_fields("grouped") == {"bias", "shift", "shift.by", "shift.floor"}
    assert builder.current_name("grouped", "shift_by") == "shift.by"
    assert builder.current_name("grouped", "bias") == "bias"
    as_written = builder.chain({}).stages[1].settings  # type: ignore[attr-defined]
    assert (as_written.shift.by, as_written.shift.floor, as_written.old_names_given) == (0.1, 0.2, ("shift_by",))
    for name in ("shift.by", "shift_by"):
        tuned = builder.chain({"grouped": {name: 0.5, "bias": 1.0}}).stages[1].settings  # type: ignore[attr-defined]
        assert (tuned.shift.by, tuned.shift.floor, tuned.bias) == (0.5, 0.2, 1.0)
    raw = with_overrides(written, {"grouped": {"shift.by": 0.5}}, registry=registry)
    assert raw["stages"][1] == {"grouped": {"shift": {"floor": 0.2, "by": 0.5}}}
    assert written["stages"][1] == {"grouped": {"shift_by": 0.1, "shift": {"floor": 0.2}}}  # left as it was


def test_apply_overrides_leaves_contradicting_parameters_to_validation() -> None:
    params = {"shift_by": 0.1, "shift": {"by": 0.2}}
    assert apply_overrides(params, {"bias": 1.0}, GroupedSettings.old_names) == params | {"bias": 1.0}


def test_tune_writes_a_config_eval_accepts_and_prints_held_out_numbers(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    corpus = write_corpus(tmp_path / "corpus.jsonl", 120)
    out = tmp_path / "tuned" / "tuned.yaml"
    out.parent.mkdir()
    code = tune_command.main([str(corpus), "--config", str(write_config(tmp_path / "relay.yaml")), "-o", str(out),
                              "--max-clarify", "0.5", "--folds", "4", "--no-progress"])
    assert code == 0
    captured = capsys.readouterr()
    assert "held-out folds pooled" in captured.out
    assert "fold 4/4" in captured.out
    # The default space names stages this chain lacks; tuning goes on without them.
    assert "no stage lm_rescore" in captured.err
    chain = build_chain(load_config(out))
    assert chain.names == ["normalize", "gate"]
    gate = chain.stages[1]
    assert isinstance(gate.settings, GateSettings)  # type: ignore[attr-defined]
    # Confident utterances are the right ones in this corpus: the gate must have learnt to ask back.
    tuned = gate.settings  # type: ignore[attr-defined]
    assert tuned.accept_posterior > 0 or tuned.accept_margin > 0


def test_tune_adds_a_gate_when_the_chain_has_none(tmp_path: Path) -> None:
    corpus = write_corpus(tmp_path / "corpus.jsonl", 60)
    config = tmp_path / "relay.yaml"
    config.write_text("stages:\n  - normalize\n")
    out = tmp_path / "tuned.yaml"
    assert tune_command.main([str(corpus), "--config", str(config), "-o", str(out), "--no-progress"]) == 0
    assert build_chain(load_config(out)).names == ["normalize", "gate"]


def test_tune_prints_only_numbers_from_utterances_the_choice_was_not_fitted_on(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    fitted: list[set[int]] = []
    scored: list[list[int]] = []
    real_fit, real_summarize = tune_workflow.fit, tune_workflow.summarize

    def spy_fit(recorded: Any, index: np.ndarray, **options: Any) -> Choice:
        fitted.append(set(index.tolist()))
        return real_fit(recorded, index, **options)

    def spy_summarize(outcomes: Any, **options: Any) -> Any:
        scored.append([int(o.id.removeprefix("t-")) for o in outcomes])
        return real_summarize(outcomes, **options)

    monkeypatch.setattr(tune_workflow, "fit", spy_fit)
    monkeypatch.setattr(tune_workflow, "summarize", spy_summarize)
    monkeypatch.setattr(relay.workbench.tuning, "summarize", spy_summarize)
    corpus = write_corpus(tmp_path / "corpus.jsonl", 80)
    # A budget above every larger one the wrong-accepts warning would look at, so its refits do not
    # add to the count (test_a_larger_budget_is_refitted_on_the_same_folds covers them).
    assert tune_command.main([str(corpus), "--config", str(write_config(tmp_path / "relay.yaml")),
                              "-o", str(tmp_path / "t.yaml"), "--folds", "4", "--max-clarify", "0.9",
                              "--no-progress"]) == 0
    # Four fold fits, then one on everything for the written file; five summaries: four folds and the pool.
    assert len(fitted) == 5 and fitted[4] == set(range(80))
    assert len(scored) == 5
    for train, test in zip(fitted[:4], scored[:4]):
        assert not train & set(test)
        assert len(train) + len(test) == 80
    assert sorted(scored[4]) == list(range(80))


def test_repeats_run_the_cross_validation_on_other_splits_and_pool_them(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    scored: list[list[int]] = []
    real_summarize = tune_workflow.summarize

    def spy_summarize(outcomes: Any, **options: Any) -> Any:
        scored.append([int(o.id.removeprefix("t-")) for o in outcomes])
        return real_summarize(outcomes, **options)

    monkeypatch.setattr(tune_workflow, "summarize", spy_summarize)
    monkeypatch.setattr(relay.workbench.tuning, "summarize", spy_summarize)
    corpus = write_corpus(tmp_path / "corpus.jsonl", 60)
    numbers = tmp_path / "numbers.json"
    assert tune_command.main([str(corpus), "--config", str(write_config(tmp_path / "relay.yaml")),
                              "-o", str(tmp_path / "t.yaml"), "--folds", "3", "--repeats", "2",
                              "--json", str(numbers), "--no-progress"]) == 0
    folds, pool = scored[:6], scored[6]
    # Each split's three folds cover every utterance once; the two splits differ.
    first, second = folds[:3], folds[3:]
    assert sorted(sum(first, [])) == sorted(sum(second, [])) == list(range(60))
    assert sorted(map(sorted, first)) != sorted(map(sorted, second))
    # The pool holds every utterance once a split.
    assert sorted(pool) == sorted(list(range(60)) * 2)
    written = json.loads(numbers.read_text())
    assert written["repeats"] == 2 and len(written["folds"]) == 6
    assert written["held_out"]["utterances"] == 120
    assert "split 2/2, fold 3/3" in capsys.readouterr().out


def test_tune_refuses_fewer_than_one_repeat(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    corpus = write_corpus(tmp_path / "corpus.jsonl", 30)
    assert tune_command.main([str(corpus), "--config", str(write_config(tmp_path / "relay.yaml")),
                              "-o", str(tmp_path / "t.yaml"), "--repeats", "0", "--no-progress"]) == 2
    assert "repeats must be at least 1" in capsys.readouterr().err
    assert not (tmp_path / "t.yaml").exists()


def test_tune_keeps_environment_references_unexpanded(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("REHEAR_TEST_PASSWORD", "hunter2")
    corpus = write_corpus(tmp_path / "corpus.jsonl", 40)
    config = tmp_path / "relay.yaml"
    config.write_text("broker:\n  password: ${REHEAR_TEST_PASSWORD}\nstages:\n  - normalize\n  - gate\n")
    out = tmp_path / "tuned.yaml"
    assert tune_command.main([str(corpus), "--config", str(config), "-o", str(out), "--no-progress"]) == 0
    written = out.read_text()
    assert "${REHEAR_TEST_PASSWORD}" in written and "hunter2" not in written
    assert load_config(out).config.broker.password is not None


def test_tune_reads_its_configuration_once(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # One read serves the chain, the commented tree the tuned file is written into, and the
    # unexpanded values: they cannot come from two versions of a file edited meanwhile.
    monkeypatch.setenv("REHEAR_TEST_LEVEL", "info")
    corpus = write_corpus(tmp_path / "corpus.jsonl", 40)
    config = tmp_path / "relay.yaml"
    config.write_text("# kept\nlogging:\n  level: ${REHEAR_TEST_LEVEL}\nstages:\n  - normalize\n  - gate   # decides\n")
    opened: list[str] = []
    real_open = pathlib.Path.open

    def counted_open(path: pathlib.Path, *args: Any, **kwargs: Any) -> Any:
        if path.resolve() == config.resolve():
            opened.append(str(args[0] if args else kwargs.get("mode", "r")))
        return real_open(path, *args, **kwargs)

    monkeypatch.setattr(pathlib.Path, "open", counted_open)
    out = tmp_path / "tuned.yaml"
    assert tune_command.main([str(corpus), "--config", str(config), "-o", str(out), "--no-progress"]) == 0
    assert opened == ["r"]
    written = out.read_text()
    assert "# kept" in written and "# decides" in written and "${REHEAR_TEST_LEVEL}" in written


def test_default_space_names_only_settings_the_stages_have() -> None:
    # A group (lexicon "general") is a setting_fields name too, but tune can only vary a value.
    fields = {stage: {name for name, _ in value_fields(settings)} for stage, settings in
              (("normalize", NormalizeSettings), ("lm_rescore", LmRescoreSettings), ("lexicon", LexiconSettings))}
    for stage, params in DEFAULT_SPACE.items():
        for param, values in params.items():
            assert param in fields[stage], f"{stage}.{param} is not a setting that holds a value"
            assert values, f"{stage}.{param} has no values"


def test_a_search_space_may_use_dotted_top_level_and_old_names(tmp_path: Path,
                                                               capsys: pytest.CaptureFixture[str]) -> None:
    space = tmp_path / "space.yaml"
    space.write_text("lexicon: {general.min_score: [0.5, 0.7], trace_top: [3], slot_min_phone: [0.7],"
                     " general.min_scor: [0.5]}\nlm_rescore: {lm_weight: [0.3]}\n")
    loaded = config_from_dict({"stages": ["normalize", "lm_rescore", {"lexicon": {"min_score": 0.6}}]},
                              base_dir=tmp_path)
    usable = tune_workflow.usable_space(load_yaml(space).value, VariantBuilder(loaded), gate="gate")
    assert usable == {"lexicon": {"general.min_score": [0.5, 0.7], "trace_top": [3], "anchored.min_phone": [0.7]},
                      "lm_rescore": {"lm_weight": [0.3]}}
    err = capsys.readouterr().err
    # A misspelt name is reported with the valid ones, dotted names among them.
    assert "stage lexicon has no setting general.min_scor (has: " in err and " general.min_score, " in err


def test_tune_keeps_comments_writes_paths_relative_to_its_output_and_obeys_the_umask(tmp_path: Path) -> None:
    corpus = write_corpus(tmp_path / "corpus.jsonl", 40)
    (tmp_path / "conf").mkdir()
    (tmp_path / "conf/words.txt").write_text("book the lathe\n")
    config = tmp_path / "conf/relay.yaml"
    config.write_text("# the workshop's relay\nlogging:\n  level: info   # quiet enough\n"
                      "domain:\n  text: words.txt   # the NLU's lines\n"
                      "stages:\n  - normalize:   # first\n      prefer: conf\n  - gate   # decides\n")
    (tmp_path / "out").mkdir()
    out = tmp_path / "out/tuned.yaml"
    old = os.umask(0o027)
    try:
        assert tune_command.main([str(corpus), "--config", str(config), "-o", str(out), "--no-progress"]) == 0
    finally:
        os.umask(old)
    written = out.read_text()
    assert written.startswith("# rehear tune on ")
    for comment in ("# the workshop's relay", "level: info   # quiet enough", "# the NLU's lines", "# first",
                    "# decides"):
        assert comment in written, comment
    body = written.split("\n", 1)[1]  # below the header, which names the corpus as given
    assert "text: ../conf/words.txt" in body and str(tmp_path) not in body
    assert "cache_dir: ../conf/.rehear-cache" in written  # the cache the configuration used stays in use
    assert out.stat().st_mode & 0o777 == 0o640
    tuned = load_config(out)
    assert tuned.domain.text == (tmp_path / "out/../conf/words.txt")
    assert tuned.config.stages[1].name == "gate" and "accept_posterior" in tuned.config.stages[1].params
    # Tuned again, the file keeps one header, not two.
    assert tune_command.main([str(corpus), "--config", str(out), "-o", str(out), "--no-progress"]) == 0
    assert out.read_text().count("# rehear tune on ") == 1


def test_a_larger_budget_is_refitted_on_the_same_folds(tmp_path: Path) -> None:
    corpus = write_corpus(tmp_path / "corpus.jsonl", 60)
    loaded = load_config(write_config(tmp_path / "relay.yaml"))
    items = read_corpus(corpus)
    result = tune_workflow.tune(loaded, items, written=load_yaml(tmp_path / "relay.yaml").value, max_clarify=0.25,
                                folds=3)
    # The same budget on the same split gives back the numbers tune printed, fold fits and all.
    assert dataclasses.asdict(result.at_budget(0.25)) == dataclasses.asdict(result.held_out)


def test_the_warning_names_the_smallest_larger_budget_that_keeps_wrong_accepts_down() -> None:
    def held(wrong: int, accepted: int, doubt: float) -> Any:
        return SimpleNamespace(wrong_accepts=wrong, accepted=accepted, wrong_accept_rate=wrong / accepted,
                               asked_doubt=doubt)

    text = tune_command.budget_lines([(0.4, held(9, 90, 0.4)), (0.5, held(3, 80, 0.5)), (0.6, held(1, 70, 0.6))])
    assert "--max-clarify 0.4: wrong accepts 10.0% (9 of 90 accepted), asked back from doubt 40.0%" in text
    assert text.endswith("the smallest of these within 5%: --max-clarify 0.5")
    assert tune_command.budget_lines([(0.4, held(9, 90, 0.4))]).endswith("none of these keeps wrong accepts within 5%")
