"""Exceptions and warnings raised by areamc.

Every error that comes from bad input derives from :class:`InputError`; the
command line turns it into a one-line message on stderr and exit status 2.

An error or warning about an argument names it by its Python parameter
name: ``OptionError("{param}: must be positive", param="seed")`` reads
"seed: must be positive".  The command line knows which of its options fed
that parameter and renders the same message with the option's flag
(``--seed: must be positive``), so the library never speaks in flags a
notebook user did not pass.  A message about several parameters names each
as ``{name}`` and lists them in `params`.
"""

from __future__ import annotations

__all__ = [
    "AreamcError",
    "AreamcWarning",
    "AreamcNotice",
    "InputError",
    "LayerError",
    "CRSError",
    "NotEqualAreaError",
    "OptionError",
]

#: Placeholder in a message template that stands for the (first) parameter's name.
PARAM = "{param}"


class _Named:
    """Message templates that name parameters: ``{param}`` for `param`, ``{name}`` for each of `params`."""

    def _setup(self, message: str, param: str | None, params: tuple[str, ...]) -> None:
        self.template = message
        self.params = tuple(params) or ((param,) if param else ())
        self.param = param or (self.params[0] if self.params else None)

    def render(self, names: dict[str, str] | None = None) -> str:
        """The message, naming each parameter as `names` says (default: its Python name)."""
        names = names or {}
        text = self.template
        if self.param is not None:
            text = text.replace(PARAM, names.get(self.param, self.param))
        for name in self.params:
            text = text.replace("{" + name + "}", names.get(name, name))
        return text


class AreamcError(_Named, Exception):
    """Base class of every error areamc raises on purpose.

    Parameters
    ----------
    message : str
        The message; ``{param}`` in it stands for `param`'s name.
    param : str, optional
        Python name of the parameter at fault (``"seed"``, ``"densify_m"``).
    params : tuple of str, optional
        Several parameters, each written ``{name}`` in the message.
    """

    exit_status = 1

    def __init__(self, message: str = "", *, param: str | None = None, params: tuple[str, ...] = ()) -> None:
        self._setup(message, param, params)
        super().__init__(self.render())


class AreamcWarning(_Named, UserWarning):
    """Warning about input that areamc used after a repair or skipped on purpose (parameters named as in errors)."""

    def __init__(self, message: str = "", *, param: str | None = None, params: tuple[str, ...] = ()) -> None:
        self._setup(message, param, params)
        super().__init__(self.render())


class AreamcNotice(AreamcWarning):
    """A note on what areamc chose for the user (which layer of a file it read); the command line
    prints it as ``areamc: note: ...`` and ``--quiet`` silences it, while warnings always show."""


class InputError(AreamcError):
    """Raised when a file, a feature or an argument cannot be used as given."""

    exit_status = 2


class LayerError(InputError):
    """Raised when a vector file or layer is missing, unreadable or holds no usable features."""


class CRSError(InputError):
    """Raised when a coordinate reference system is missing, unknown or unusable."""


class NotEqualAreaError(CRSError):
    """Raised when a requested plane distorts areas over the data's extent."""


class OptionError(InputError):
    """Raised when an argument's value is out of range or of the wrong kind."""
