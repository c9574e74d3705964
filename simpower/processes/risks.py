"""A control risk and one effect measure (odds ratio, risk ratio or risk difference), checked once.

Shared by ``binary_two_arm`` and the ``binary`` outcome layer of ``trial``.
"""

from __future__ import annotations

from ..errors import ParameterError

EFFECTS = ("odds_ratio", "risk_ratio", "risk_difference")


def risk_from_effect(p0: float, *, odds_ratio=None, risk_ratio=None, risk_difference=None) -> float:
    """Treatment-arm risk implied by a control risk and one effect measure."""
    if odds_ratio is not None:
        odds = odds_ratio * p0 / (1.0 - p0)
        return odds / (1.0 + odds)
    if risk_ratio is not None:
        return risk_ratio * p0
    return p0 + risk_difference


class OneBinaryEffect:
    """Mixin: a control risk ``p0`` and exactly one effect parameter (:data:`EFFECTS`), checked once.

    Gives the effect parameter that was given (set to its null value by ``null``), its null value and
    the treatment risk ``nominal_p1`` it implies; used by ``binary_two_arm`` and the ``binary`` layer of
    ``trial``.
    """

    def _check_effect(self) -> None:
        given = [k for k in EFFECTS if self._p[k] is not None]
        if len(given) != 1:
            got = "none" if not given else " and ".join(f"`{k}`" for k in given)
            raise ParameterError(f"`odds_ratio`, `risk_ratio`, `risk_difference`: give exactly one effect; got {got}.")
        p1 = self.nominal_p1
        if not 0.0 < p1 < 1.0:
            k = given[0]
            raise ParameterError(f"`{k}` = {self._p[k]:g} with p0 = {self.p0:g} gives a treatment risk of {p1:g}; "
                                 f"it must be in (0, 1).")

    @property
    def effect_param(self) -> str:  # type: ignore[override]
        """The effect parameter that was given (set to its null value by :meth:`null`)."""
        return next(k for k in EFFECTS if self._p[k] is not None)

    def null_value(self) -> float:
        return 0.0 if self.effect_param == "risk_difference" else 1.0

    @property
    def nominal_p1(self) -> float:
        """The treatment risk the effect gives at ``p0`` (with no cluster variation)."""
        return risk_from_effect(self.p0, odds_ratio=self._p["odds_ratio"], risk_ratio=self._p["risk_ratio"],
                                risk_difference=self._p["risk_difference"])
