"""Point flags as a defined set (gcmc.kernel.flags): text, parsing, and which make a point
unconverged, against the sampler that writes them and the kernel files that store them."""

from __future__ import annotations

import numpy as np

from gcmc.kernel import flags as fl


def test_the_set_is_closed_and_named_once() -> None:
    names = [f.name for f in fl.FLAGS]
    assert len(names) == len(set(names))
    assert all(n.isidentifier() and n == n.lower() for n in names)
    # only the informational flag leaves a point converged
    assert [f.name for f in fl.FLAGS if not f.unconverged] == ["inaccessible"]


def test_text_round_trips_through_the_parser() -> None:
    for f in fl.FLAGS:
        for replica in (None, 0, 3):
            for detail in ("", "z = 4.1: a colon inside; no", "N = 12"):
                if ";" in detail:
                    continue  # the separator cannot appear inside a flag
                text = fl.flag_text(f, replica, detail)
                assert fl.kind(text) == f.name
                assert fl.has_flag([text], f)
                assert fl.has_flag(text, f, replica=replica) or replica is None
                assert fl.lookup(fl.kind(text)) is f


def test_has_flag_does_not_match_by_prefix() -> None:
    """The old prefix match treated any text starting with "drift" as the drift flag; a kind
    is matched whole."""
    assert not fl.has_flag("drifting_apart: z = 2", fl.DRIFT)
    assert not fl.has_flag("few_exchanges_ok", fl.FEW_EXCHANGES)
    assert fl.has_flag("error_unreliable[1]: no plateau; drift[0]: z = 4", fl.DRIFT, replica=0)
    assert not fl.has_flag("drift[0]: z = 4", fl.DRIFT, replica=1)


def test_makes_unconverged() -> None:
    assert not fl.makes_unconverged("")
    assert not fl.makes_unconverged([])
    assert not fl.makes_unconverged(fl.flag_text(fl.INACCESSIBLE))
    for f in fl.FLAGS:
        if f.unconverged:
            joined = fl.join([fl.flag_text(fl.INACCESSIBLE), fl.flag_text(f, 1, "x")])
            assert fl.makes_unconverged(joined), f.name
    # a kind a newer writer may add is not taken as harmless
    assert fl.makes_unconverged("some_future_flag: detail")


def test_count_kinds_and_without() -> None:
    stored = np.array(
        ["", "drift[0]: z = 3.1", "replicas_disagree: 4 vs 5 (z = 4.0); drift[1]: z = 3", ""]
    )
    counts = fl.count_kinds(stored.ravel())
    assert counts == {"drift": 2, "replicas_disagree": 1}
    assert fl.without("inaccessible; drift[0]: z = 9", fl.INACCESSIBLE) == ["drift[0]: z = 9"]


def test_every_flag_documented_in_the_kernel_readme() -> None:
    from gcmc.kernel.schema import README

    text = README.read_text(encoding="utf-8")
    for f in fl.FLAGS:
        assert f"| `{f.name}` | {'yes' if f.unconverged else 'no'} |" in text, f.name


def test_sampler_flags_are_of_the_set_and_decide_converged() -> None:
    """_analyse on synthetic replica runs (stationary Poisson-like series of N): two replicas
    whose means differ by ~40 standard errors disagree; a replica that renewed its content
    far less often than it holds molecules is frozen. The flags are of the set, and converged
    follows makes_unconverged."""
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from test_engine_bookkeeping import methane_slit

    from gcmc.sampling.box import Box
    from gcmc.sampling.point import SamplingSettings, ThermoState, _analyse, _ReplicaRun

    model = methane_slit(1.2)
    state = ThermoState(temperature_K=298.15, fugacity_Pa=1.0e6)
    box = Box(model, 298.15, state.activity_nm3)
    rng = np.random.default_rng(5)

    def run(mean: float, exchanges: int) -> _ReplicaRun:
        n = rng.poisson(mean, 4000)
        u = -1000.0 * n + rng.normal(0, 50, size=n.size)
        return _ReplicaRun(
            n=n, uff=u, usf=u, profile=np.zeros(box.n_bins), box=box, moves=400_000,
            seconds=1.0, t0=0, k_trials=1, acceptance={}, exchanges=exchanges,
        )  # fmt: skip

    two = SamplingSettings(replicas=2, sample_every=100)
    out = _analyse(model, state, two, [run(30.0, 5000), run(33.0, 5000)]).result
    assert fl.has_flag(out.flags, fl.REPLICAS_DISAGREE) and not out.converged
    one = SamplingSettings(replicas=1, sample_every=100)
    frozen = _analyse(model, state, one, [run(30.0, 3)]).result
    assert fl.has_flag(frozen.flags, fl.FEW_EXCHANGES, replica=0) and not frozen.converged
    fine = _analyse(model, state, one, [run(30.0, 5000)]).result
    assert fine.converged and not fine.flags, fine.flags
    for r in (out, frozen, fine):
        assert all(fl.lookup(k) is not None for k in fl.kinds(r.flags)), r.flags
        assert r.converged == (not fl.makes_unconverged(r.flags))
