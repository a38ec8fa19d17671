"""Which catalogue fix each tracked action kind carries out.

A kind belongs to the fixes that name it (``fix.actions``); failing that, to fixes whose
targets set its time-since feature (``since_coil_cleaning_d`` for ``coil_cleaning``), or whose
kind reads the same once spaces and case are set aside (``firmware update``). A kind with no
fix is still measured; it has no model estimate.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from causeline.service.spec.dataset import DatasetSpec, ReasonCode


@dataclass(frozen=True)
class Link:
    """An action kind and one fix kind it carries out (None: no catalogue fix), by which
    reason codes' fixes, and why they were linked."""

    action_kind: str
    fix_kind: str | None
    codes: tuple[str, ...]
    how: str

    @property
    def name(self) -> str:
        """The file name's stem: the fix kind, or the action kind without one."""
        return slug(self.fix_kind or self.action_kind).replace("_", "-")


def slug(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "_", text.lower()).strip("_")


def links(spec: DatasetSpec) -> list[Link]:
    """One link per (action kind, fix kind), kinds in the config's order."""
    timeline = spec.timeline
    kinds = timeline.actions.kinds if timeline is not None and timeline.actions else ()
    fixed = [code for code in spec.reason_codes if code.fix is not None]
    out: list[Link] = []
    for kind in kinds:
        how, matched = _match(spec, kind, fixed)
        if not matched:
            out.append(Link(kind, None, (), ""))
            continue
        by_kind: dict[str, list[str]] = {}
        for code in matched:
            by_kind.setdefault(code.fix.kind, []).append(code.code)  # type: ignore[union-attr]
        out += [Link(kind, fix, tuple(codes), how) for fix, codes in by_kind.items()]
    return out


def _match(spec: DatasetSpec, kind: str, fixed: list[ReasonCode]) -> tuple[str, list[ReasonCode]]:
    """The codes a kind belongs to by the first rule that finds any, and the rule."""
    assert spec.timeline is not None
    since = spec.timeline.action_feature(kind)

    def sets_since(code: ReasonCode) -> bool:
        return any(not spec.feature(t).derived and spec.feature(t).source_column == since
                   for t in code.fix.targets)  # type: ignore[union-attr]

    named = [c for c in fixed if kind in c.fix.actions]  # type: ignore[union-attr]
    if named:
        return "named in fix.actions", named
    targeted = [c for c in fixed if sets_since(c)]
    if targeted:
        return f"its targets set {since}", targeted
    same = [c for c in fixed if slug(c.fix.kind) == slug(kind)]  # type: ignore[union-attr]
    return ("same name", same) if same else ("", [])
