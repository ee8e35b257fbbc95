"""The figures ``trimtab check`` prints for a config: shrink, step margins, memory, warnings.

The inequalities themselves are :mod:`trimtab.model.stability` (pure arithmetic, which the config's
validators use); this module applies them to a whole validated config.
"""

from __future__ import annotations

from typing import Any

from trimtab.config.tree import Config
from trimtab.model.stability import shrink_ratio, step_check

__all__ = ["derived_figures"]

DAY = 86400.0


def derived_figures(cfg: Config) -> dict[str, Any]:
    """The numbers ``trimtab check`` prints: shrink, step margins, memory, terms, warnings."""
    lc = cfg.learning
    m = lc.memory
    nominal = shrink_ratio(lc.alpha, lc.lam, m)
    strongest = shrink_ratio(lc.alpha_max, lc.lambda_max, m)
    weakest = shrink_ratio(lc.alpha_min, lc.lambda_min, m)
    shrink: dict[str, Any] = {
        "rule": "0 ≤ alpha_max·lambda_max/memory < 1",
        "factor_at_alpha_lambda": 1.0 - nominal,
        "factor_at_max_bounds": 1.0 - strongest,
        "factor_at_min_bounds": 1.0 - weakest,
        "over_memory_at_alpha_lambda": (1.0 - nominal) ** m,
        "note": (
            "lambda_max = 0: no pull toward the prior at all"
            if lc.lambda_max == 0.0
            else "plain-step factors; a normalised step divides α by 1 + ‖φ‖², pulling less"
        ),
    }
    sensors: dict[str, Any] = {}
    for label, settings in cfg.settings_groups().items():
        chk = step_check(
            label,
            terms=settings.term_count(),
            alpha_max=lc.alpha_max,
            lambda_max=lc.lambda_max,
            memory=m,
            clip=lc.feature_clip,
            normalised=lc.normalised,
        )
        sensors[label] = {
            "terms": chk.terms,
            "term_names": list(settings.term_spec().names()),
            "phi_sq_max": chk.phi_sq_max,
            "step": "normalised" if chk.normalised else "plain",
            "inequality": chk.inequality,
            "worked": chk.worked,
            "actual": chk.actual,
            "bound": chk.bound,
            "margin": chk.margin,
        }
    seconds = m * lc.reference_interval
    return {
        "shrink": shrink,
        "step_stability": sensors,
        "memory": {
            "references": m,
            "reference_interval_s": lc.reference_interval,
            "seconds": seconds,
            "days": seconds / DAY,
        },
        "warnings": _warnings(cfg),
    }


def _warnings(cfg: Config) -> list[str]:
    """Legal but probably unintended settings, one sentence each."""
    out: list[str] = []
    if cfg.topics.qos == 0:
        out.append("topics.qos = 0: messages published while the daemon is away are lost")
    tls = cfg.broker.tls
    if tls.enabled and not tls.verify:
        out.append("broker.tls.verify = false: the broker's certificate is not checked")
    if not tls.enabled and (cfg.broker.password_env or cfg.broker.password_file):
        out.append("broker.tls.enabled = false: the password travels unencrypted")
    if cfg.output.stale_after <= cfg.learning.reference_interval:
        out.append(
            f"output.stale_after = {cfg.output.stale_after:g} s ≤ learning.reference_interval "
            f"= {cfg.learning.reference_interval:g} s: values will be flagged stale between "
            "ordinary references"
        )
    if not cfg.state.dir.startswith("/"):
        out.append(
            f"state.dir = {cfg.state.dir!r} is relative: it is taken from the daemon's "
            "working directory"
        )
    if cfg.state.durability == "flush":
        out.append("state.durability = 'flush': a power cut can lose the last references")
    return out
