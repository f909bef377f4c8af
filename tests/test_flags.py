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
    # the certificate's flags are of the one table, and none shares a kind with the
    # point-wise sampler's
    assert set(fl.CERTIFICATE_FLAGS) <= set(fl.FLAGS)
    assert [f.name for f in fl.CERTIFICATE_FLAGS] == [
        "preparations_disagree",
        "preparation_drift",
        "few_renewals",
        "box_size_disagrees",
        "budget_spent",
    ]


def test_text_round_trips_through_the_parser() -> None:
    for f in fl.FLAGS:
        for replica in (None, 0, 3, "below", "below, larger box"):
            for detail in ("", "z = 4.1: a colon inside; no", "N = 12"):
                if ";" in detail:
                    continue  # the separator cannot appear inside a flag
                text = fl.flag_text(f, replica, detail)
                assert fl.kind(text) == f.name
                assert fl.has_flag([text], f)
                assert fl.has_flag(text, f, replica=replica) or replica is None
                assert fl.lookup(fl.kind(text)) is f


def test_separator_inside_a_detail_cannot_split_a_flag() -> None:
    """A detail holding "; " (the separator) used to become a second, unknown flag when the
    stored string was read back; flag_text writes it as ",", so one flag stays one."""
    text = fl.flag_text(fl.BUDGET_SPENT, detail="9 CPU s after 1 attempt(s); the next would")
    stored = fl.join([text, fl.flag_text(fl.FEW_RENEWALS, "annealed", "1.0 < 3")])
    assert fl.kinds(stored) == ["budget_spent", "few_renewals"]
    assert fl.has_flag(stored, fl.FEW_RENEWALS, replica="annealed")
    assert not fl.has_flag(stored, fl.FEW_RENEWALS, replica="below")
    assert fl.kind(fl.flag_text(fl.PREPARATION_DRIFT, "odd]:name;")) == "preparation_drift"


def test_certificate_flags_are_of_the_set_and_decide_converged() -> None:
    """judge_preparations on invented preparations that fail every criterion at once: each
    flag it writes is of the table (CERTIFICATE_FLAGS), parses back from the stored string,
    and makes the point unconverged, as its verdict says."""
    from test_certificate import _prep

    from gcmc.sampling import certificate as C

    preps = [
        _prep("below", 20.0, renewals=0.5),
        _prep("overfilled", 21.0, drift_passed=False, drift_z=6.0),
        _prep("annealed", 19.9),
        _prep("below-2", 20.1),
    ]
    cert = C.judge_preparations(C.CertifySettings(), preps, _prep("box", 23.0), 10, 1.0)
    stored = fl.join(cert.result.flags)
    assert set(fl.kinds(stored)) == {
        "preparations_disagree",
        "preparation_drift",
        "few_renewals",
        "box_size_disagrees",
    }
    assert fl.has_flag(stored, fl.PREPARATION_DRIFT, replica="overfilled")
    assert fl.has_flag(stored, fl.FEW_RENEWALS, replica="below")
    assert all(fl.lookup(k) in fl.CERTIFICATE_FLAGS for k in fl.kinds(stored))
    assert not cert.certified and cert.result.converged == (not fl.makes_unconverged(stored))


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
