"""Task files: validation, the Task object, sampling and the entropy rate."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from foretell.errors import TaskError
from foretell.tasks import Task, load_task, shipped_tasks

TASKS = Path(__file__).resolve().parents[1] / "tasks"


def h2(p: float) -> float:
    """Binary entropy in bits."""
    return 0.0 if p in (0.0, 1.0) else -(p * math.log2(p) + (1 - p) * math.log2(1 - p))


def two_state(p: float, q: float) -> Task:
    """Binary first-order chain: P(switch | a) = p, P(switch | b) = q."""
    return Task.from_dict({
        "name": "two-state", "symbols": ["a", "b"],
        "contexts": [{"past": ["a"], "next": {"a": 1 - p, "b": p}},
                     {"past": ["b"], "next": {"a": q, "b": 1 - q}}],
    })


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "task.toml"
    path.write_text(text)
    return path


@pytest.mark.parametrize("name", ["lantern-relay", "tide-gauge", "compass-fair", "keypad-chase"])
def test_shipped_tasks_load(name: str) -> None:
    task = load_task(TASKS / f"{name}.toml")
    assert task.name == name
    assert np.allclose(task.next_probs.sum(axis=1), 1.0)


def test_shipped_tasks_cover_required_shapes() -> None:
    tasks = [load_task(p) for p in sorted(TASKS.glob("*.toml"))]
    assert {2, 3} <= {t.n_symbols for t in tasks}
    assert max(t.max_depth for t in tasks) >= 3


@pytest.mark.parametrize("p,q", [(0.2, 0.6), (0.1, 0.1), (0.5, 0.5), (0.9, 0.3)])
def test_entropy_rate_two_state_markov_chain(p: float, q: float) -> None:
    # Cover & Thomas, Elements of Information Theory, 2nd ed. (2006), Example 4.2.1:
    # H = (q h(p) + p h(q)) / (p + q) bits (formula from memory, not looked up).
    expected = (q * h2(p) + p * h2(q)) / (p + q)
    assert two_state(p, q).entropy_rate().bits == pytest.approx(expected, abs=1e-12)


def test_entropy_rate_iid_is_shannon_entropy() -> None:
    # Memoryless source: the entropy rate is the entropy of one draw (Shannon, 1948; common practice).
    task = load_task(TASKS / "compass-fair.toml")
    p = np.array([0.4, 0.3, 0.2, 0.1])
    assert task.entropy_rate().bits == pytest.approx(float(-(p * np.log2(p)).sum()), abs=1e-12)


@pytest.mark.parametrize("p,q", [(0.2, 0.6), (0.1, 0.3), (0.5, 0.5)])
def test_accuracy_ceiling_of_a_two_state_chain(p: float, q: float) -> None:
    # Two-state Markov chain, switching with probability p from a and q from b: the stationary
    # distribution is (q, p) / (p + q) (common practice; any Markov-chain text), and the Bayes rule
    # guesses the likelier next symbol in each state, right with probability max(p, 1 - p) after a.
    expected = (q * max(p, 1 - p) + p * max(q, 1 - q)) / (p + q)
    assert two_state(p, q).accuracy_ceiling() == pytest.approx(expected, abs=1e-12)


def test_accuracy_ceiling_is_nan_without_a_single_recurrent_class_and_chance_for_a_fair_source() -> None:
    task = Task.from_dict({
        "name": "absorbing", "symbols": ["a", "b"],
        "contexts": [{"past": ["a"], "next": {"a": 1.0, "b": 0.0}}, {"past": ["b"], "next": {"a": 0.0, "b": 1.0}}]})
    assert math.isnan(task.accuracy_ceiling())
    assert load_task(TASKS / "compass-fair.toml").accuracy_ceiling() == pytest.approx(0.4)  # i.i.d.: the top p


def test_entropy_rate_reports_each_recurrent_class() -> None:
    # a and b are absorbing: two recurrent classes, each deterministic (rate 0);
    # c is transient. No single rate exists, so bits is nan.
    task = Task.from_dict({
        "name": "absorbing", "symbols": ["a", "b", "c"],
        "contexts": [{"past": ["a"], "next": {"a": 1.0, "b": 0.0, "c": 0.0}},
                     {"past": ["b"], "next": {"a": 0.0, "b": 1.0, "c": 0.0}},
                     {"past": ["c"], "next": {"a": 0.5, "b": 0.25, "c": 0.25}}]})
    rate = task.entropy_rate()
    assert not rate.irreducible and math.isnan(rate.bits)
    assert sorted(c.pasts for c in rate.classes) == [((0,),), ((1,),)]
    assert all(c.entropy_rate_bits == 0.0 for c in rate.classes)


def test_entropy_rate_depth_two_matches_direct_stationary() -> None:
    # Independent computation: power iteration of the dense chain on pasts.
    task = load_task(TASKS / "tide-gauge.toml")
    m, d = task.n_symbols, task.max_depth
    pasts = [(i, j) for i in range(m) for j in range(m)]
    P = np.zeros((4, 4))
    for k, s in enumerate(pasts):
        probs = task.next_probs[task.context_of(list(s))]
        for a in range(m):
            P[k, pasts.index((s[1], a))] = probs[a]
    pi = np.full(4, 0.25)
    for _ in range(5000):
        pi = pi @ P
    h = [-(task.next_probs[task.context_of(list(s))] * np.log2(task.next_probs[task.context_of(list(s))])).sum()
         for s in pasts]
    assert task.entropy_rate().bits == pytest.approx(float(pi @ h), abs=1e-9)
    assert d == 2


def test_symbol_mapping_and_context_lookup() -> None:
    task = load_task(TASKS / "lantern-relay.toml")
    assert task.symbols == ("red", "green", "blue")
    assert task.index_of("blue") == 2
    assert task.decode(task.encode(["green", "red"])) == ["green", "red"]
    assert task.contexts[task.context_of(["blue", "red", "green", "green"])] == (0, 1, 1)
    assert task.contexts[task.context_of(["green", "red"])] == (0,)
    with pytest.raises(TaskError, match="too short"):
        task.context_of(["green", "green"])
    x = task.encode(["red", "green", "green", "blue", "red"])
    # trial 0 has no past; trial 1 follows red; trial 2 follows red-green;
    # trial 3 follows red-green-green; trial 4 follows blue.
    ci = task.context_indices(x)
    assert ci[0] == -1
    assert [task.contexts[i] for i in ci[1:]] == [(0,), (0, 1), (0, 1, 1), (2,)]
    probs = task.next_proba(x)
    assert np.allclose(probs[0], 1 / 3) and np.allclose(probs[1], task.next_probs[ci[1]])
    assert task.context_label((0, 1)) == "red-green" and task.context_label(()) == "*"


def test_sample_is_seeded() -> None:
    task = load_task(TASKS / "lantern-relay.toml")
    assert np.array_equal(task.sample(300, seed=7), task.sample(300, seed=7))
    assert not np.array_equal(task.sample(300, seed=7), task.sample(300, seed=8))


# ---- validation: one test per bad input -------------------------------------------------
GOOD_HEAD = 'name = "t"\nsymbols = ["a", "b"]\n'


@pytest.mark.parametrize("body,fragment", [
    ('[[contexts]]\npast = ["z"]\nnext = {a = 0.5, b = 0.5}\n', "unknown symbol 'z' in 'past'"),
    ('[[contexts]]\npast = []\nnext = {a = 0.5, c = 0.5}\n', "unknown symbol 'c' in 'next'"),
    ('[[contexts]]\npast = []\nnext = {a = 1.2, b = -0.2}\n', "negative probability"),
    ('[[contexts]]\npast = []\nnext = {a = 0.5, b = 0.6}\n', "sum to 1.1"),
    ('[[contexts]]\npast = []\nnext = {a = 1.0}\n', "no probability for 'b'"),
    ('[[contexts]]\npast = ["a"]\nnext = {a = 0.5, b = 0.5}\n', "no context matches a past ending in [b]"),
    ('[[contexts]]\npast = ["a"]\nnext = {a = 0.5, b = 0.5}\n'
     '[[contexts]]\npast = ["b"]\nnext = {a = 0.5, b = 0.5}\n'
     '[[contexts]]\npast = ["a", "b"]\nnext = {a = 0.5, b = 0.5}\n', "both match a past ending in [a, b]"),
    ('[[contexts]]\npast = []\nnext = {a = 0.5, b = 0.5}\n'
     '[[contexts]]\npast = []\nnext = {a = 0.5, b = 0.5}\n', "given twice"),
])
def test_bad_contexts_are_named(tmp_path: Path, body: str, fragment: str) -> None:
    path = write(tmp_path, GOOD_HEAD + body)
    with pytest.raises(TaskError) as err:
        load_task(path)
    assert fragment in str(err.value)
    assert str(path) in str(err.value)


def test_probability_tolerance_is_1e_9(tmp_path: Path) -> None:
    ok = write(tmp_path, GOOD_HEAD + '[[contexts]]\npast = []\nnext = {a = 0.5, b = 0.5000000001}\n')
    assert load_task(ok).n_symbols == 2
    bad = write(tmp_path, GOOD_HEAD + '[[contexts]]\npast = []\nnext = {a = 0.5, b = 0.500000002}\n')
    with pytest.raises(TaskError, match="not 1"):
        load_task(bad)


@pytest.mark.parametrize("symbols,fragment", [
    ('["a", "a"]', "unique"), ('["a", "b-c"]', "without '-'"), ('["a", "b c"]', "whitespace"),
    ('["a", ""]', "non-empty"), ('["a"]', "at least two"),
])
def test_bad_symbol_labels(tmp_path: Path, symbols: str, fragment: str) -> None:
    path = write(tmp_path, f'name = "t"\nsymbols = {symbols}\n[[contexts]]\npast = []\nnext = {{a = 1.0}}\n')
    with pytest.raises(TaskError, match=fragment):
        load_task(path)


def test_invalid_toml_names_the_line(tmp_path: Path) -> None:
    path = write(tmp_path, 'name = "t"\nsymbols = = ["a", "b"]\n')
    with pytest.raises(TaskError) as err:
        load_task(path)
    assert err.value.problems[0].line == 2
    assert f"{path}:" in str(err.value)


def test_missing_file() -> None:
    with pytest.raises(TaskError, match="not found"):
        load_task("no/such/task.toml")


# ---- property: samples follow allowed transitions and approach the specified frequencies ----
@st.composite
def random_tasks(draw: st.DrawFn) -> Task:
    """A random complete context tree: each node splits with some probability, up to depth 3."""
    m = draw(st.integers(2, 4))
    symbols = [f"s{i}" for i in range(m)]

    def grow(ctx: tuple[int, ...]) -> list[tuple[int, ...]]:
        if len(ctx) < 3 and draw(st.booleans()):
            return [c for a in range(m) for c in grow((a,) + ctx)]
        return [ctx]

    contexts = grow(())
    rows = []
    for _ in contexts:
        w = np.array(draw(st.lists(st.integers(0, 5), min_size=m, max_size=m)), dtype=float)
        if w.sum() == 0:
            w[0] = 1.0
        rows.append(w / w.sum())
    return Task.from_dict({"name": "random", "symbols": symbols, "contexts": [
        {"past": [symbols[i] for i in c], "next": dict(zip(symbols, map(float, r)))}
        for c, r in zip(contexts, rows)]})


@settings(max_examples=30, deadline=None)
@given(task=random_tasks(), seed=st.integers(0, 2**32 - 1))
def test_samples_follow_the_tree(task: Task, seed: int) -> None:
    x = task.sample(4000, seed=seed)
    ctx = task.context_indices(x)
    t = np.flatnonzero(ctx >= 0)
    # never a transition of probability zero
    assert np.all(task.next_probs[ctx[t], x[t]] > 0)
    # empirical next-symbol frequencies approach the specified ones (a 6-sigma band)
    for i in np.unique(ctx[t]):
        sel = t[ctx[t] == i]
        if len(sel) < 200:
            continue
        freq = np.bincount(x[sel], minlength=task.n_symbols) / len(sel)
        p = task.next_probs[i]
        assert np.all(np.abs(freq - p) <= 6 * np.sqrt(p * (1 - p) / len(sel)) + 1e-12)


def test_shipped_task_by_name() -> None:
    assert {"lantern-relay", "tide-gauge", "compass-fair", "keypad-chase"} <= set(shipped_tasks())
    assert load_task("tide-gauge").name == "tide-gauge"


@pytest.mark.parametrize("make", ["directory", "binary"])
def test_unreadable_task_is_a_task_error(tmp_path: Path, make: str) -> None:
    if make == "directory":
        path = tmp_path / "adir"
        path.mkdir()
    else:
        path = tmp_path / "bin.toml"
        path.write_bytes(b"name = \"\xff\xfe\"\n")
    with pytest.raises(TaskError) as err:
        load_task(path)
    assert str(path) in str(err.value)


def test_completeness_is_checked_for_very_deep_trees() -> None:
    # 23 a's: 2**23 pasts, too many to list; the check walks the tree instead.
    contexts = [{"past": ["a"] * 23, "next": {"a": 0.5, "b": 0.5}}]
    with pytest.raises(TaskError, match=r"past ending in \[b\]"):
        Task.from_dict({"name": "deep", "symbols": ["a", "b"], "contexts": contexts})


# ---- the response design and tasks that give no source ----------------------------------
def test_response_defaults_to_guess_and_accepts_reaction(tmp_path: Path) -> None:
    body = '[[contexts]]\npast = []\nnext = {a = 0.5, b = 0.5}\n'
    assert load_task(write(tmp_path, GOOD_HEAD + body)).response == "guess"
    task = load_task(write(tmp_path, GOOD_HEAD + 'response = "reaction"\n' + body))
    assert task.response == "reaction"
    assert "response: reaction" in task.describe()


@pytest.mark.parametrize("value", ['"press"', '["guess"]', "1"])
def test_bad_response_names_the_key_and_line(tmp_path: Path, value: str) -> None:
    path = write(tmp_path, GOOD_HEAD + f"response = {value}\n")
    with pytest.raises(TaskError) as err:
        load_task(path)
    (problem,) = err.value.problems
    assert (problem.column, problem.line) == ("response", 3)
    assert "'guess', 'reaction'" in problem.message


def test_task_without_contexts_gives_no_source(tmp_path: Path) -> None:
    task = load_task(write(tmp_path, GOOD_HEAD + 'description = "own sequences"\n'))
    assert not task.has_source and task.max_depth == 0 and task.n_symbols == 2
    text = task.describe()
    assert "source not given" in text and "entropy" not in text and "context" not in text
    for call in (task.entropy_rate, lambda: task.sample(10, seed=0),
                 lambda: task.next_proba(np.zeros(3, dtype=np.int64)),
                 lambda: task.context_indices(np.zeros(3, dtype=np.int64)),
                 lambda: task.context_of(["a"])):
        with pytest.raises(TaskError, match="task 't' gives no source"):
            call()
    assert task.to_frame().empty


def test_task_without_contexts_needs_two_symbols(tmp_path: Path) -> None:
    with pytest.raises(TaskError, match="at least two"):
        load_task(write(tmp_path, 'name = "t"\nsymbols = ["a"]\n'))


def test_empty_contexts_list_is_refused(tmp_path: Path) -> None:
    with pytest.raises(TaskError, match="leave it out"):
        load_task(write(tmp_path, GOOD_HEAD + "contexts = []\n"))


def test_shipped_task_without_source() -> None:
    task = load_task("keypad-chase")
    assert (task.response, task.has_source, task.n_symbols) == ("reaction", False, 4)


# ---- regressions: values and shapes that used to pass or crash --------------------------
@pytest.mark.parametrize("value", ["nan", "inf", "-inf", "+nan"])
def test_non_finite_probability_is_refused(tmp_path: Path, value: str) -> None:
    path = write(tmp_path, GOOD_HEAD + f'[[contexts]]\npast = []\nnext = {{ a = {value}, b = 0.75 }}\n')
    with pytest.raises(TaskError) as err:
        load_task(path)
    (problem,) = err.value.problems
    assert (problem.column, problem.line) == ("contexts[1].next", 5)
    assert "finite number in [0, 1]" in problem.message


def test_probability_above_one_is_refused_even_if_the_sum_is_one(tmp_path: Path) -> None:
    path = write(tmp_path, GOOD_HEAD + '[[contexts]]\npast = []\nnext = { a = 1.5, b = -0.5 }\n')
    with pytest.raises(TaskError, match=r"a = 1\.5, b = -0\.5 \(negative probability\)"):
        load_task(path)


@pytest.mark.parametrize("text,key,line", [
    ('name = "t"\nsymbols = [["a"], ["b"]]\n', "symbols", 2),
    (GOOD_HEAD + '[[contexts]]\npast = [["a"]]\nnext = {a = 0.5, b = 0.5}\n', "contexts[1].past", 4),
    (GOOD_HEAD + '[[contexts]]\npast = [1]\nnext = {a = 0.5, b = 0.5}\n', "contexts[1].past", 4),
])
def test_nested_lists_are_one_line_errors(tmp_path: Path, text: str, key: str, line: int) -> None:
    with pytest.raises(TaskError) as err:
        load_task(write(tmp_path, text))
    assert [(p.column, p.line) for p in err.value.problems][:1] == [(key, line)]
    assert "\n" not in str(err.value)


def test_semantic_errors_name_the_line_of_their_table(tmp_path: Path) -> None:
    text = (GOOD_HEAD + "\n[[contexts]]\npast = [\"a\"]\nnext = {a = 0.5, b = 0.5}\n"
            "\n[[contexts]]\n# the second one\npast = [\"b\"]\nnext = {a = 0.5, b = 0.6}\n")
    with pytest.raises(TaskError) as err:
        load_task(write(tmp_path, text))
    (problem,) = err.value.problems
    assert (problem.column, problem.line) == ("contexts[2].next", 11)
    assert "task.toml:11:" in str(problem)
    dup = GOOD_HEAD + "[[contexts]]\npast = []\nnext = {a = 0.5, b = 0.5}\n" * 2
    with pytest.raises(TaskError) as err:
        load_task(write(tmp_path, dup))
    assert [(p.column, p.line) for p in err.value.problems] == [("contexts[2]", 6)]


def test_toml_error_names_line_and_undecodable_byte_names_line(tmp_path: Path) -> None:
    path = tmp_path / "task.toml"
    path.write_bytes(b'name = "t"\n# caf\xe9\nsymbols = ["a", "b"]\n')
    with pytest.raises(TaskError) as err:
        load_task(path)
    assert err.value.problems[0].line == 2 and "UTF-8" in str(err.value)


def test_negative_zero_never_prints(tmp_path: Path) -> None:
    path = write(tmp_path, GOOD_HEAD + "[[contexts]]\npast = []\nnext = {a = -0.0, b = 1.0}\n")
    text = load_task(path).describe()
    assert "-0" not in text
    assert "entropy rate: 0.0000 bits per symbol" in text


def test_counts_use_the_singular() -> None:
    text = two_state(0.2, 0.6).describe()
    assert "2 symbols" in text and "2 contexts" in text
    assert "1 context," in load_task(TASKS / "compass-fair.toml").describe()


# ---- issue 20: typos, byte-order marks, names that shadow, arguments in words -----------
BODY = '[[contexts]]\npast = []\nnext = {a = 0.5, b = 0.5}\n'


@pytest.mark.parametrize("text,key,line,char,suggestion", [
    (GOOD_HEAD + "[[contexs]]\npast = []\nnext = {a = 0.5, b = 0.5}\n", "contexs", 3, 3, "contexts"),
    (GOOD_HEAD + "block_lenght = 100\n" + BODY, "block_lenght", 3, 1, "block_length"),
    (GOOD_HEAD + 'symbol = ["a", "b"]\n' + BODY, "symbol", 3, 1, "symbols"),
    (GOOD_HEAD + '[[contexts]]\npast = []\n  nxt = {a = 0.5, b = 0.5}\n', "contexts[1].nxt", 5, 3, "next"),
])
def test_unknown_keys_are_refused_with_a_suggestion(tmp_path: Path, text: str, key: str, line: int,
                                                     char: int, suggestion: str) -> None:
    path = write(tmp_path, text)
    with pytest.raises(TaskError) as err:
        load_task(path)
    (problem,) = [p for p in err.value.problems if "unknown key" in p.message]
    assert (problem.column, problem.line, problem.char) == (key, line, char)
    assert f"did you mean '{suggestion}'?" in problem.message
    assert str(problem).startswith(f"{path}:{line}:{char}: ")


def test_a_byte_order_mark_is_accepted(tmp_path: Path) -> None:
    path = tmp_path / "task.toml"
    path.write_bytes(b"\xef\xbb\xbf" + (GOOD_HEAD + BODY).encode("utf-8"))
    assert load_task(path).symbols == ("a", "b")


def test_a_folder_never_hides_a_shipped_task(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    (tmp_path / "lantern-relay").mkdir()  # e.g. an output folder named after the task
    task = load_task("lantern-relay")
    assert task.path == str(shipped_tasks()["lantern-relay"])
    assert any("folder" in note and "shipped" in note for note in task.notes)
    assert "shipped" in task.describe()


def test_a_file_named_like_a_shipped_task_is_used_and_said(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    (tmp_path / "tide-gauge").write_text(GOOD_HEAD + BODY)
    task = load_task("tide-gauge")
    assert task.symbols == ("a", "b")
    (note,) = task.notes
    assert "tide-gauge" in note and "not the task shipped" in note
    assert note in task.describe()
    assert load_task(TASKS / "tide-gauge.toml").notes == ()


def test_arguments_are_checked_in_words(tide: Task) -> None:
    from foretell.errors import UsageError

    with pytest.raises(UsageError, match="whole number >= 0"):
        tide.sample(-5, seed=0)
    with pytest.raises(UsageError, match="symbol indices"):
        tide.decode([0, 7])
    with pytest.raises(UsageError, match="symbol indices"):
        tide.context_indices(np.array([0, 1, 2]))
    with pytest.raises(UsageError, match="initial"):
        tide.sample(5, seed=0, initial=[0, 5])
    with pytest.raises(UsageError, match="task file"):
        load_task(3)
    with pytest.raises(TaskError, match="mapping"):
        Task.from_dict([("name", "t")])
    assert tide.sample(0, seed=0).shape == (0,)


def test_a_seed_generator_is_used_as_it_is(tide: Task) -> None:
    a = tide.sample(50, seed=np.random.default_rng(3))
    b = tide.sample(50, seed=np.random.default_rng(3))
    assert np.array_equal(a, b)


def test_impossible_transitions_are_listed(tmp_path: Path) -> None:
    task = Task.from_dict({"name": "t", "symbols": ["a", "b"], "contexts": [
        {"past": ["a"], "next": {"a": 0.0, "b": 1.0}}, {"past": ["b"], "next": {"a": 0.5, "b": 0.5}}]})
    x = task.encode(["b", "a", "b", "a", "a", "b", "a", "a"])
    assert task.impossible(x).tolist() == [4, 7]
    assert task.impossible(x[:1]).tolist() == []
