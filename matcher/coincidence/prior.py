"""The prior ``π``: that a counterpart of a class is produced and reported.

``π = efficiency × p_astro × P(NS | astrophysical)`` (the last factor only for
classes that need a neutron star).

The alert's ``source_probs`` (``bns``, ``nsbh``, ``bbh``, ``terrestrial``)
partition all outcomes, terrestrial included, so ``bns + nsbh`` is already the
joint probability "astrophysical and with a neutron star". Multiplying it by
``p_astro`` again would count ``p_astro`` twice; the conditional
``P(NS | astro) = (bns + nsbh) / (bns + nsbh + bbh)`` is used instead, so that
``p_astro × P(NS | astro) = bns + nsbh`` when ``p_astro = 1 - terrestrial``.

Defaults when the alert lacks them (documented, not guessed per event):

* ``p_astro``: ``1 - terrestrial`` if ``source_probs`` has ``terrestrial``,
  else ``bns + nsbh + bbh`` if any of them is given, else **1** — the odds are
  then conditional on the event being astrophysical.
* ``P(NS | astro)``: **1** when none of ``bns``, ``nsbh``, ``bbh`` is given (or
  they are all zero) — the odds are then conditional on a neutron star.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

__all__ = ["event_probabilities", "class_prior", "DEFAULT_P_ASTRO", "DEFAULT_P_NS"]

DEFAULT_P_ASTRO = 1.0
DEFAULT_P_NS = 1.0


def event_probabilities(p_astro: float | None, source_probs: Mapping[str, float] | None) -> tuple[float, float]:
    """``(p_astro, P(NS | astrophysical))`` for one alert, with the defaults above."""
    probs = dict(source_probs or {})
    astro_keys = [k for k in ("bns", "nsbh", "bbh") if k in probs]
    if p_astro is None:
        if "terrestrial" in probs:
            p_astro = 1.0 - float(probs["terrestrial"])
        elif astro_keys:
            p_astro = float(sum(probs[k] for k in astro_keys))
        else:
            p_astro = DEFAULT_P_ASTRO
    p_astro = min(max(float(p_astro), 0.0), 1.0)
    total = float(sum(probs[k] for k in astro_keys))
    if astro_keys and total > 0:
        p_ns = (float(probs.get("bns", 0.0)) + float(probs.get("nsbh", 0.0))) / total
    else:
        p_ns = DEFAULT_P_NS
    return p_astro, min(max(p_ns, 0.0), 1.0)


def class_prior(efficiency, needs_neutron_star, p_astro: float, p_ns: float) -> np.ndarray:
    """``π`` for each class (or report): ``efficiency × p_astro × (P(NS|astro) if needed)``."""
    eff = np.asarray(efficiency, dtype=np.float64)
    ns = np.asarray(needs_neutron_star, dtype=bool)
    return eff * p_astro * np.where(ns, p_ns, 1.0)
