"""Lot control: rules that watch the parts of a lot for signs of a bench problem, and the
alarms they raise (docs/outlier-screening.md, "Lot control").

Rules are listed in the sequence's `lot_control:` section; each has an action:
warn (log and go on), pause (bench to its safe state, the operator decides: continue, skip
the site, stop) or stop (the lot stops, exit 3, `--resume` continues it).

- consecutive_fails: `count` failing parts in a row on one site (a lost contact, a broken
  socket).
- rolling_yield: yield of the last `window` parts under `floor_pct`.
- site_yield: one site's yield far below the other sites', judged on disjoint blocks of
  `window` parts of that site against the other sites' last `window` parts each, by a
  one-sided Fisher exact test at `alpha`. Its false-alarm rate per check is at most `alpha`
  (the exact test is conservative); a lot of P parts has at most P / window checks, so at
  most alpha x P / window false alarms per lot (union bound).
- soft_bin_share: share of the last `window` parts in `soft_bins` over `ceiling_pct`.

Parts with no pass/fail (tester faults) are not counted by any rule. After a rule fires, its
evidence is cleared, so it fires again only on new parts.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StrictInt

from station.config.files import YamlDocument, validate_model

ACTIONS = ("warn", "pause", "stop")
Action = Literal["warn", "pause", "stop"]


@dataclass(frozen=True)
class Rule:
    kind: str
    name: str
    action: str
    count: int = 0            # consecutive_fails
    window: int = 0           # rolling_yield, site_yield, soft_bin_share
    floor_pct: float = 0.0    # rolling_yield
    alpha: float = 0.001      # site_yield
    soft_bins: tuple[int, ...] = ()
    ceiling_pct: float = 0.0  # soft_bin_share


@dataclass(frozen=True)
class Alarm:
    rule: str
    action: str
    site: int | None
    message: str
    parts: tuple[str, ...]
    time: str

    def as_json(self) -> dict[str, Any]:
        """The lot.json form (docs/datalog-format.md)."""
        return {"rule": self.rule, "action": self.action, "site": self.site, "message": self.message,
                "parts": list(self.parts), "time": self.time}


# ---- configuration -----------------------------------------------------------------------------

class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid")


class _Common(_Model):
    name: str | None = None
    action: Action


class _Consecutive(_Common):
    rule: Literal["consecutive_fails"]
    count: StrictInt = Field(ge=2, le=10000)


class _Rolling(_Common):
    rule: Literal["rolling_yield"]
    window: StrictInt = Field(ge=10, le=100000)
    floor_pct: float = Field(gt=0, lt=100)


class _SiteYield(_Common):
    rule: Literal["site_yield"]
    window: StrictInt = Field(50, ge=10, le=100000)
    alpha: float = Field(0.001, gt=0, le=0.05)


class _SoftBinShare(_Common):
    rule: Literal["soft_bin_share"]
    soft_bins: list[Annotated[StrictInt, Field(ge=0, le=32767)]] = Field(min_length=1)
    ceiling_pct: float = Field(gt=0, lt=100)
    window: StrictInt = Field(200, ge=10, le=100000)


class _Entry(_Model):
    entry: Annotated[_Consecutive | _Rolling | _SiteYield | _SoftBinShare, Field(discriminator="rule")]


RULE_KINDS = ("consecutive_fails", "rolling_yield", "site_yield", "soft_bin_share")


def read_lot_control(doc: YamlDocument, data: Any) -> tuple[Rule, ...]:
    """The sequence's `lot_control:` list as rules; a ConfigError names the line that is wrong."""
    if data is None:
        return ()
    if not isinstance(data, list):
        raise doc.error(["lot_control"], "expected a list of rules",
                        f"each a mapping with rule: one of {', '.join(RULE_KINDS)} and action: warn, pause or stop")
    rules = []
    names: set[str] = set()
    for i, raw in enumerate(data):
        path: list[str | int] = ["lot_control", i]
        if not isinstance(raw, dict) or raw.get("rule") not in RULE_KINDS:
            raise doc.error(path, f"unknown or missing rule {raw.get('rule') if isinstance(raw, dict) else raw!r}",
                            f"rule: one of {', '.join(RULE_KINDS)}")
        model = validate_model(doc, _Entry, data={"entry": raw}, at=path).entry
        name = model.name or model.rule
        if name in names:
            raise doc.error(path, f"two rules are named {name!r}", "give one a name: to tell their alarms apart")
        names.add(name)
        fields: dict[str, Any] = {k: v for k, v in model.model_dump().items() if k not in ("rule", "name")}
        if "soft_bins" in fields:
            fields["soft_bins"] = tuple(fields["soft_bins"])
        rules.append(Rule(kind=model.rule, name=name, **fields))
    return tuple(rules)


# ---- evaluation --------------------------------------------------------------------------------

@dataclass(frozen=True)
class Seen:
    part_id: str
    site: int
    passed: bool
    soft_bin: int


@dataclass
class _State:
    streak: dict[int, list[Seen]] = field(default_factory=dict)
    recent: deque[Seen] = field(default_factory=deque)
    per_site: dict[int, deque[Seen]] = field(default_factory=dict)
    block: dict[int, list[Seen]] = field(default_factory=dict)


def now_iso() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


class LotControl:
    """Feed it every judged part (`observe`); `take()` returns the alarms raised since the last call."""

    def __init__(self, rules: tuple[Rule, ...], sites: int, clock: Any = now_iso) -> None:
        self.rules = rules
        self.sites = sites
        self.clock = clock
        self._state = {rule.name: _State() for rule in rules}
        self._new: list[Alarm] = []
        if any(rule.kind == "site_yield" for rule in rules):
            _fisher_less([[1, 0], [0, 1]])   # load scipy.stats now, before the lot, not mid-lot

    def observe(self, part_id: str, site: int, passed: bool | None, soft_bin: int) -> None:
        if passed is None:             # a tester fault says nothing of the parts
            return
        seen = Seen(part_id, site, passed, soft_bin)
        for rule in self.rules:
            getattr(self, f"_{rule.kind}")(rule, self._state[rule.name], seen)

    def take(self) -> list[Alarm]:
        alarms, self._new = self._new, []
        return alarms

    def _raise(self, rule: Rule, site: int | None, message: str, parts: list[str]) -> None:
        self._new.append(Alarm(rule.name, rule.action, site, message, tuple(parts), self.clock()))

    def _consecutive_fails(self, rule: Rule, state: _State, seen: Seen) -> None:
        streak = state.streak.setdefault(seen.site, [])
        if seen.passed:
            streak.clear()
            return
        streak.append(seen)
        if len(streak) >= rule.count:
            bins = ", ".join(str(b) for b in sorted({s.soft_bin for s in streak}))
            self._raise(rule, seen.site, f"site {seen.site}: {len(streak)} failing parts in a row "
                        f"({streak[0].part_id} to {streak[-1].part_id}, soft bin {bins}): check the fixture of "
                        f"site {seen.site} (contact, socket, leakage)", [s.part_id for s in streak])
            streak.clear()

    def _rolling_yield(self, rule: Rule, state: _State, seen: Seen) -> None:
        state.recent.append(seen)
        if len(state.recent) > rule.window:
            state.recent.popleft()
        if len(state.recent) < rule.window:
            return
        good = sum(s.passed for s in state.recent)
        share = 100.0 * good / len(state.recent)
        if share < rule.floor_pct:
            failing = [s.part_id for s in state.recent if not s.passed]
            self._raise(rule, None, f"yield of the last {len(state.recent)} parts is {share:.1f} % "
                        f"(floor {rule.floor_pct:g} %)", failing)
            state.recent.clear()

    def _site_yield(self, rule: Rule, state: _State, seen: Seen) -> None:
        history = state.per_site.setdefault(seen.site, deque(maxlen=rule.window))
        history.append(seen)
        block = state.block.setdefault(seen.site, [])
        block.append(seen)
        if len(block) < rule.window:
            return
        others = [s for site, h in state.per_site.items() if site != seen.site for s in h]
        state.block[seen.site] = []
        if len(others) < rule.window:
            return
        good, bad = sum(s.passed for s in block), sum(not s.passed for s in block)
        o_good, o_bad = sum(s.passed for s in others), sum(not s.passed for s in others)
        p = _fisher_less([[good, bad], [o_good, o_bad]])
        threshold = rule.alpha
        if p < threshold:
            self._raise(rule, seen.site,
                        f"site {seen.site}: yield {100 * good / len(block):.1f} % of its last {len(block)} parts, "
                        f"other sites {100 * o_good / len(others):.1f} % of {len(others)} "
                        f"(Fisher exact p = {p:.2g} < {threshold:.2g})",
                        [s.part_id for s in block if not s.passed])

    def _soft_bin_share(self, rule: Rule, state: _State, seen: Seen) -> None:
        state.recent.append(seen)
        if len(state.recent) > rule.window:
            state.recent.popleft()
        if len(state.recent) < rule.window:
            return
        hits = [s.part_id for s in state.recent if s.soft_bin in rule.soft_bins]
        share = 100.0 * len(hits) / len(state.recent)
        if share > rule.ceiling_pct:
            bins = ", ".join(str(b) for b in rule.soft_bins)
            self._raise(rule, None, f"soft bin {bins}: {len(hits)} of the last {len(state.recent)} parts "
                        f"({share:.1f} %, ceiling {rule.ceiling_pct:g} %)", hits)
            state.recent.clear()


def _fisher_less(table: list[list[int]]) -> float:
    """One-sided (less) Fisher exact p-value of a 2x2 table.

    scipy.stats is imported here, not at module level: it takes about a second, and every
    `station` command imports this module through the sequence schema."""
    from scipy.stats import fisher_exact

    _odds, p = fisher_exact(table, alternative="less")
    return float(p)
