"""What every use case shares: the errors a specification can raise, and loading the
model cards a specification names.

* :class:`SpecError`: a field of a specification is wrong (``field="tube"``, ``"fix.n"``,
  ``"grid_resistance"``); an :class:`~fitter.errors.InputError`, printed ``field: message``.
* :class:`NoResult`: the input was fine but gives no result (a model with no finite
  current at the point asked for); a front end reports it as failed, not as bad input.
"""

from __future__ import annotations

from ..errors import InputError

__all__ = ["SpecError", "NoResult", "load_unit"]


class SpecError(InputError):
    """A field of a specification is wrong; the text reads ``field: message``."""

    def __init__(self, message: str, *, field: str | None = None):
        super().__init__(message, field=field)

    def __str__(self) -> str:
        return f"{self.field}: {self.message}" if self.field else self.message


class NoResult(RuntimeError):
    """The specification was valid but gives no result; ``field`` names what to change."""

    def __init__(self, message: str, *, field: str | None = None):
        self.message = message
        self.field = field
        super().__init__(message)


def load_unit(path, field: str):
    """The fitted unit in the model card at ``path``; a bad card is a :class:`SpecError`
    about ``field`` whose message is the card's own error (file and card field)."""
    from ..card import CardError, load_card

    try:
        return load_card(path)
    except CardError as e:
        raise SpecError(str(e), field=field) from None
