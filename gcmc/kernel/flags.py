"""Point flags: the defined set of diagnostics a simulated point can carry.

A point's flags are stored in the kernel file (``/points/<branch>/flags``) as one string:
flags joined by ``"; "``; each flag is its kind, optionally an index ``[r]`` naming the
replica (for the certificate's flags: the preparation, ``[below]``), and optionally ``": "``
and a detail (``"drift[1]: first vs second half z = 4.1"``). The kind decides the meaning and
whether the point is unconverged; nothing else matches flag text. The standard library only
(the kernel reader imports it).

Two samplers write them: the point-wise sampler (:mod:`gcmc.sampling.point`, the flags from
:data:`DRIFT` to :data:`TARGET_NOT_REACHED`) and the certificate of a filled point
(:mod:`gcmc.sampling.certificate`, :data:`CERTIFICATE_FLAGS`), which the escalation of a
quality-target build reaches for dense subcritical points.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass

#: Separator between the flags of one point.
SEPARATOR = "; "


@dataclass(frozen=True)
class Flag:
    """One kind of point flag.

    Attributes
    ----------
    name : str
        The kind, as written at the start of the flag text.
    meaning : str
        What it says about the point.
    unconverged : bool
        Whether the flag makes the point unconverged (``converged = 0``).
    """

    name: str
    meaning: str
    unconverged: bool


DRIFT = Flag(
    "drift",
    "first against second half of a replica's production differ, |z| > 3",
    True,
)
REPLICAS_DISAGREE = Flag(
    "replicas_disagree",
    "the two replicas' means differ by more than 3 combined errors and 1 %",
    True,
)
NOT_BRACKETED = Flag(
    "not_bracketed",
    "the over-filled replica started below the first replica's mean by more than the "
    "agreement tolerance (1 %), so the two-sided test was one-sided",
    True,
)
FEW_EXCHANGES = Flag(
    "few_exchanges",
    "a replica holding one molecule or more on average accepted fewer insertions + "
    "deletions in production than it holds molecules, or fewer than 20: its content was "
    "never renewed through the reservoir (a frozen, solid-like packing)",
    True,
)
ERROR_UNRELIABLE = Flag(
    "error_unreliable", "no block-averaging plateau: the standard error is not reliable", True
)
TOO_FEW_SAMPLES = Flag(
    "too_few_samples", "a replica has too few production samples for the drift test", True
)
TARGET_NOT_REACHED = Flag(
    "target_not_reached",
    "a target relative error was not met within the move budget",
    True,
)
INACCESSIBLE = Flag(
    "inaccessible",
    "the pore does not admit the probe: zero loading, not simulated (informational)",
    False,
)

# --- the certificate of a filled point (gcmc.sampling.certificate) --------------------------
PREPARATIONS_DISAGREE = Flag(
    "preparations_disagree",
    "certificate: the independent preparations' densities spread beyond the tolerance "
    "(default 1 %)",
    True,
)
PREPARATION_DRIFT = Flag(
    "preparation_drift",
    "certificate: a preparation failed the drift test (first vs second half); the index "
    "names the preparation",
    True,
)
FEW_RENEWALS = Flag(
    "few_renewals",
    "certificate: a preparation's content was renewed fewer times than required (hot-rung "
    "arrivals plus exchanges per molecule); the index names the preparation",
    True,
)
BOX_SIZE_DISAGREES = Flag(
    "box_size_disagrees",
    "certificate: the larger lateral box gives a density beyond the tolerance (default 1 %) "
    "from the preparations' mean",
    True,
)
BUDGET_SPENT = Flag(
    "budget_spent",
    "certificate: the CPU budget ran out before the certificate held",
    True,
)

#: The flags the certificate of a filled point may carry.
CERTIFICATE_FLAGS: tuple[Flag, ...] = (
    PREPARATIONS_DISAGREE,
    PREPARATION_DRIFT,
    FEW_RENEWALS,
    BOX_SIZE_DISAGREES,
    BUDGET_SPENT,
)

#: Every flag kind, in the order documented.
FLAGS: tuple[Flag, ...] = (
    DRIFT,
    REPLICAS_DISAGREE,
    NOT_BRACKETED,
    FEW_EXCHANGES,
    ERROR_UNRELIABLE,
    TOO_FEW_SAMPLES,
    TARGET_NOT_REACHED,
    INACCESSIBLE,
    *CERTIFICATE_FLAGS,
)
BY_NAME: dict[str, Flag] = {f.name: f for f in FLAGS}


def _index(replica: int | str) -> str:
    return replica if isinstance(replica, str) else str(int(replica))


def flag_text(flag: Flag, replica: int | str | None = None, detail: str = "") -> str:
    """The text of one flag: ``kind[replica]: detail`` (index and detail optional; the index
    is a replica number, or a preparation's name for the certificate's flags). A ``";"``
    inside the index or the detail, which would split the flag when stored, is written as
    ``","``; ``"]"`` and ``":"`` inside the index as ``")"`` and ``","``."""
    if replica is None:
        text = flag.name
    else:
        index = _index(replica).replace(";", ",").replace("]", ")").replace(":", ",")
        text = f"{flag.name}[{index}]"
    detail = detail.replace(";", ",")
    return f"{text}: {detail}" if detail else text


def split(flags: str | Iterable[str]) -> list[str]:
    """The single flags of a point: a stored string (joined by ``"; "``) or a list of flags."""
    items = flags.split(";") if isinstance(flags, str) else list(flags)
    return [s.strip() for s in items if s and s.strip()]


def kind(text: str) -> str:
    """The kind of one flag's text: before the first ``:``, without an index ``[r]``."""
    head = text.split(":", 1)[0].strip()
    return head.split("[", 1)[0].strip()


def kinds(flags: str | Iterable[str]) -> list[str]:
    """The kinds of a point's flags, in order."""
    return [kind(s) for s in split(flags)]


def lookup(name: str) -> Flag | None:
    """The :class:`Flag` of a kind name, or None for a kind this version does not define."""
    return BY_NAME.get(name)


def has_flag(flags: str | Iterable[str], flag: Flag, replica: int | str | None = None) -> bool:
    """Whether the point's flags contain ``flag`` (for one replica or preparation, if
    ``replica`` is given)."""
    for s in split(flags):
        if kind(s) != flag.name:
            continue
        if replica is None:
            return True
        head = s.split(":", 1)[0].strip()
        if head == f"{flag.name}[{_index(replica)}]":
            return True
    return False


def makes_unconverged(flags: str | Iterable[str]) -> bool:
    """Whether any of the point's flags makes it unconverged. A kind this version does not
    define counts as unconverged (a newer writer's flag is not taken as harmless)."""
    for k in kinds(flags):
        f = BY_NAME.get(k)
        if f is None or f.unconverged:
            return True
    return False


def without(flags: str | Iterable[str], *drop: Flag) -> list[str]:
    """The point's flags except those of the kinds in ``drop``."""
    names = {f.name for f in drop}
    return [s for s in split(flags) if kind(s) not in names]


def count_kinds(values: Iterable[object]) -> Counter:
    """Count flag kinds over many points' flag strings (e.g. a flags array's ``ravel()``)."""
    counts: Counter = Counter()
    for item in values:
        for k in kinds(str(item)):
            if k:
                counts[k] += 1
    return counts


def join(flags: Iterable[str]) -> str:
    """One stored string from a point's flags (``""`` when clean)."""
    return SEPARATOR.join(flags)


__all__ = [
    "CERTIFICATE_FLAGS",
    "FLAGS",
    "SEPARATOR",
    "Flag",
    "count_kinds",
    "flag_text",
    "has_flag",
    "join",
    "kind",
    "kinds",
    "lookup",
    "makes_unconverged",
    "split",
    "without",
]
