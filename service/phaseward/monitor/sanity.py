"""Definition sanity: a definition that cannot describe real hardware is refused (422 naming
the field); one that is merely unusual is stored and answered with warnings.

The schema bounds every field to a physical range on its own; the rules here judge fields
against each other, per phase after the overrides are applied. Each rule names its basis:

Refused (``InvalidInput``):

* ``trip_below_rating``: a phase's overcurrent limit below its rated current. The breaker
  would open before the phase reaches its rating, so the rating cannot be carried (what a
  rating means; common practice).
* ``limit_not_above_ambient``: a junction limit at or below the ambient temperature. A
  dissipating junction sits above ambient in steady state (theta_JA = (T_J - T_A) / P > 0,
  JEDEC JESD51-1), so the limit is crossed at any load.
* ``warning_not_above_ambient``: the warning line (limit minus margin) at or below ambient,
  the same argument for the line capacity and forecasts hold the junctions below.
* ``winding_drop_exceeds_headroom``: the inductor winding's drop at rated current, I R_L,
  at or above Vin - Vout. Volt-second balance of a buck with winding resistance gives
  Vout = D Vin - I R_L (Erickson & Maksimovic, *Fundamentals of Power Electronics*, the
  inductor copper loss model of chapter 3, from memory), so the duty cycle would have to
  exceed 1.
* ``loss_vanishes_above_ambient``: a temperature coefficient and reference temperature (of
  Rds(on), or of a loss table) whose linear law reaches zero above the ambient: colder than
  that the resistance, and the loss, would be negative. A linear coefficient is a fit around
  its reference (common practice), and a resistance is never negative.

Warned (stored, listed in the answer):

* ``load_above_ratings``: the rated load above the sum of the phase ratings.
* ``load_above_capacity``: the rated load above what all phases can carry within their
  ratings and the warning line, in steady state at the rail's ambient with the declared
  sharing (the capacity the monitor computes); this includes no capacity at all when a
  junction is above its warning line with no load.
* ``no_steady_state_at_load``: thermal runaway at the rated load (the losses' temperature
  feedback outgrows the network's conductance), so screening and forecasts answer 409.
* ``winding_loss_high``: the winding's drop at rated current above 5 % of Vout, that is
  its copper loss above 5 % of the phase's output power; a usual multiphase inductor loses
  about 1 % (common practice). Often a DCR given in ohm where milliohm was meant.
* ``loss_table_short``: a loss table ending below the phase's rated current: above its
  last point the loss is extrapolated linearly, which understates a convex curve (see
  :mod:`phaseward.physics.losses`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from phaseward.errors import InvalidInput
from phaseward.monitor import rail_model
from phaseward.monitor.rail_model import RailModel, phase_power, phase_specs
from phaseward.physics.capacity import remaining_capacity
from phaseward.physics.thermal import steady_state_c

WINDING_LOSS_WARNING = 0.05  # of the phase's output power at rating (common practice)
_LOSS_MODELS = ("power_stage", "loss_table")


@dataclass(frozen=True)
class Notice:
    """A warning about a stored definition: the field, the rule and what is unusual."""

    field: str
    rule: str
    detail: str


def review(rail_id: str, spec: Mapping[str, Any]) -> tuple[RailModel, list[Notice]]:
    """The rail's model and the warnings of a definition; InvalidInput if it cannot be right."""
    try:
        with np.errstate(divide="raise", over="raise", invalid="raise"):
            model = rail_model.build(rail_id, 0, spec)
    except (ValueError, FloatingPointError) as err:  # physics names the argument it refused
        raise InvalidInput(f"the definition cannot be modelled: {err}", field="phase") from err
    phases = phase_specs(spec)
    origin = _Origins(spec)
    _refuse_impossible(model, phases, origin)
    return model, _warnings(model, phases, origin)


class _Origins:
    """Where a phase's effective value comes from: its override, or the shared phase."""

    def __init__(self, spec: Mapping[str, Any]) -> None:
        self._given: dict[int, tuple[int, set[str]]] = {}
        for j, o in enumerate(spec.get("overrides", [])):
            keys = {k for k, v in o.items() if k != "index" and v is not None}
            if keys & set(_LOSS_MODELS):
                keys |= set(_LOSS_MODELS)
            self._given[int(o["index"])] = (j, keys)

    def field(self, phase: int, path: str, *, against: str | None = None) -> str:
        """Where ``path`` of ``phase`` is given; for a rule between two fields, the one the
        phase's override sets if only ``against`` is set there (the override made the clash)."""
        j, keys = self._given.get(phase, (-1, set()))
        if path.split(".")[0] in keys:
            return f"overrides[{j}].{path}"
        if against is not None and against.split(".")[0] in keys:
            return f"overrides[{j}].{against}"
        return f"phase.{path}"


def _first(bad: np.ndarray[Any, Any]) -> int | None:
    hits = np.flatnonzero(bad)
    return int(hits[0]) if hits.size else None


def _refuse_impossible(model: RailModel, phases: list[dict[str, Any]], origin: _Origins) -> None:
    i = _first(model.overcurrent_limit_a < model.rated_current_a)
    if i is not None:
        raise InvalidInput(
            f"trip_below_rating: phase {i} trips at {model.overcurrent_limit_a[i]:g} A, below "
            f"its rated {model.rated_current_a[i]:g} A, so it can never carry its rating",
            field=origin.field(i, "overcurrent_limit_a", against="rated_current_a"),
        )
    i = _first(model.junction_limit_c <= model.ambient_c)
    if i is not None:
        raise InvalidInput(
            f"limit_not_above_ambient: phase {i}'s junction limit {model.junction_limit_c[i]:g}"
            f" degC is not above the ambient {model.ambient_c:g} degC; a working junction is "
            "always hotter than its ambient",
            field=origin.field(i, "junction_limit_c"),
        )
    i = _first(model.temp_limit_c <= model.ambient_c)
    if i is not None:
        raise InvalidInput(
            f"warning_not_above_ambient: phase {i}'s warning line {model.temp_limit_c[i]:g} "
            f"degC (limit minus warning_margin_k {model.warning_margin_k[i]:g} K) is not above "
            f"the ambient {model.ambient_c:g} degC",
            field=origin.field(i, "warning_margin_k", against="junction_limit_c"),
        )
    for tc_key, ref, tc in (
        ("power_stage.rds_tc_per_k", model.losses.rds_ref_c, model.losses.rds_tc_per_k),
        ("loss_table.tc_per_k", model.losses.table_ref_c, model.losses.table_tc_per_k),
    ):
        with np.errstate(divide="ignore"):
            zero_c = np.where(tc > 0.0, ref - 1.0 / tc, -np.inf)
        i = _first(zero_c >= model.ambient_c)
        if i is not None:
            raise InvalidInput(
                f"loss_vanishes_above_ambient: phase {i}'s loss law 1 + {tc[i]:g} (T - "
                f"{ref[i]:g}) reaches zero at {zero_c[i]:g} degC, above the ambient "
                f"{model.ambient_c:g} degC: colder than that its loss would be negative",
                field=origin.field(i, tc_key),
            )
    drop = model.rated_current_a * model.dcr_ohm
    i = _first(drop >= model.vin_v - model.vout_v)
    if i is not None:
        raise InvalidInput(
            f"winding_drop_exceeds_headroom: phase {i}'s winding drops {drop[i]:g} V at its "
            f"rated {model.rated_current_a[i]:g} A, at least vin_v - vout_v = "
            f"{model.vin_v - model.vout_v:g} V: the duty cycle would exceed 1",
            field=origin.field(i, "inductor.dcr_ohm", against="rated_current_a"),
        )


def _warnings(model: RailModel, phases: list[dict[str, Any]], origin: _Origins) -> list[Notice]:
    out: list[Notice] = []
    ratings = float(model.rated_current_a.sum())
    if model.load_a > ratings:
        out.append(
            Notice(
                "load_a", "load_above_ratings",
                f"the rated load {model.load_a:g} A is above the sum of the phase ratings "
                f"{ratings:g} A: the rail is overloaded with every phase working",
            )
        )  # fmt: skip
    active = np.ones((1, model.n_phases), dtype=bool)
    cap = remaining_capacity(
        model.network, model.losses, active=active, weights=model.share_target,
        rated_current_a=model.rated_current_a, temp_limit_c=model.temp_limit_c,
        ambient_c=model.ambient_c,
    )  # fmt: skip
    capacity, kind = float(cap.capacity_a[0]), str(cap.binding_kind[0])
    if model.load_a > capacity and kind == "warning_line":
        out.append(
            Notice(
                "load_a", "load_above_capacity",
                f"the rated load {model.load_a:g} A is above the {capacity:g} A all phases can "
                f"carry below their warning lines at {model.ambient_c:g} degC (phase "
                f"{int(cap.binding_phase[0])} binds)",
            )
        )  # fmt: skip
    share = model.share_target / model.share_target.sum()
    p0, slope = phase_power(model, model.load_a * share, np.ones(model.n_phases, dtype=bool))
    _, runaway = steady_state_c(model.network, p0, slope, model.ambient_c, runaway="flag")
    if bool(np.asarray(runaway).any()):
        out.append(
            Notice(
                "load_a", "no_steady_state_at_load",
                f"at the rated load {model.load_a:g} A the losses outgrow the cooling (thermal "
                "runaway): screening and forecasts from the rated load cannot be answered",
            )
        )  # fmt: skip
    drop = model.rated_current_a * model.dcr_ohm
    i = _first(drop > WINDING_LOSS_WARNING * model.vout_v)
    if i is not None:
        out.append(
            Notice(
                origin.field(i, "inductor.dcr_ohm"), "winding_loss_high",
                f"phase {i}'s winding loses {100 * drop[i] / model.vout_v:.3g} % of its output "
                f"power at its rated {model.rated_current_a[i]:g} A (DCR {model.dcr_ohm[i]:g} "
                "ohm); about 1 % is usual: is the DCR in ohm?",
            )
        )  # fmt: skip
    for i, p in enumerate(phases):
        table = p.get("loss_table")
        if table is not None and max(table["current_a"]) < model.rated_current_a[i]:
            out.append(
                Notice(
                    origin.field(i, "loss_table.current_a"), "loss_table_short",
                    f"phase {i}'s loss table ends at {max(table['current_a']):g} A, below its "
                    f"rated {model.rated_current_a[i]:g} A: losses above are extrapolated",
                )
            )  # fmt: skip
            break
    return out
