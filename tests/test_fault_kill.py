"""SIGKILL in every verb loses nothing that returned (issue 17, "Proof").

A short run of `benchmarks.fault_kill` (the full one: `python -m benchmarks.fault_kill --kills 100
--seed 0`): 12 kills on one copy of the scanned demo folder, every verb (scan, label, accept, split,
undo, later, relearn, export) at least once, each kill either at a random moment of the call or just
before a random one of its store statements / file operations; then the command line (`python -m
app.cli accept ...`, `export ...`) killed as a subprocess. What counts as "in the store" is
read with plain sqlite3, not with Kinfold's own code; see the module's docstring.
"""
import pytest

from benchmarks import fault_kill


@pytest.fixture(scope="module")
def figures(scanned_demo, tmp_path_factory):
    # 12 kills of Project's verbs, then `kinfold accept` and `kinfold export` killed once each as
    # subprocesses (accept by the clock, `python -m app.cli`; export before a random step of the process).
    return fault_kill.run(kills=12, seed=0, work=tmp_path_factory.mktemp("fault") / "run", scanned=scanned_demo,
                          added=6, verbose=False, calibrate=False, cli_kills=2)


def test_every_verb_is_killed(figures):
    assert sum(figures.kills.values()) == 14
    assert {v for v in fault_kill.VERBS if figures.kills[v] == 0} == set()
    assert figures.kills["cli accept"] == figures.kills["cli export"] == 1


def test_every_returned_call_is_in_the_store(figures):
    assert len(figures.returned_decisions) >= 12   # 0-2 ordinary decisions per round, plus the killed verbs'
    assert figures.lost == {}
    assert figures.other_lost == []


def test_store_passes_integrity_check(figures):
    assert figures.integrity_failures == []


def test_next_open_scan_propose_export_work(figures):
    assert figures.next_run_failures == []


def test_killed_decision_is_all_or_nothing(figures):
    assert figures.half == []


def test_previous_export_intact_and_no_temporary_survives(figures):
    assert figures.partial_exports == []
    assert figures.leftover_temporaries == {}
