"""Option lists of the kernels' methods, shared by the coder and the learner records.

A method's options are the keyword-only parameters of its function: their names,
defaults and type hints are read from the signature (declared once, where the code
uses them), and the method's record adds the help text and, for options the function
requires, the value a caller that names none runs with.
"""

from __future__ import annotations

import inspect
import typing
from typing import Any, Callable, Mapping, NamedTuple

from ..errors import InputError, problem

__all__ = ["Option", "REQUIRED", "keyword_options", "option_list", "refuse_unknown_options"]


class _Required:
    """The default of an option the caller must always give (e.g. a trained encoder)."""

    def __repr__(self) -> str:
        return "REQUIRED"


#: Default of an option that has none: the caller must give it.
REQUIRED: Any = _Required()


class Option(NamedTuple):
    """One option of a coder or learner: ``(name, default, type, help)``.

    ``default`` is what the method runs with when the option is not given
    (:data:`REQUIRED` when it must be given); ``type`` is the parameter's type hint.
    """

    name: str
    default: Any
    type: Any
    help: str


def keyword_options(fn: Callable, leave_out: tuple[str, ...] = ()) -> list[str]:
    """The keyword-only parameters of ``fn``, sorted: how every coder and every learner
    declares its options (``leave_out``: those its caller wires in itself)."""
    params = inspect.signature(fn).parameters
    return sorted(n for n, p in params.items()
                  if p.kind is inspect.Parameter.KEYWORD_ONLY and n not in leave_out)


def option_list(fn: Callable, help: Mapping[str, str], defaults: Mapping[str, Any] = {},
                leave_out: tuple[str, ...] = ()) -> tuple[Option, ...]:
    """The options of ``fn`` with their help, sorted by name.

    Parameters
    ----------
    fn : callable
        The method; its keyword-only parameters are its options.
    help : mapping of str to str
        One line of help per option; must name exactly the options.
    defaults : mapping, optional
        Values for options ``fn`` requires, used when the caller gives none.
    leave_out : tuple of str
        Keyword parameters the caller wires in itself (not options).

    Returns
    -------
    tuple of Option

    Raises
    ------
    ValueError
        ``help`` or ``defaults`` do not match the signature (a programming error in the
        method's record, caught when the module is imported).
    """
    names = keyword_options(fn, leave_out)
    if set(help) != set(names) or not set(defaults) <= set(names):
        raise ValueError(f"record of {fn.__name__}: help for {sorted(help)} and defaults for "
                         f"{sorted(defaults)}, options are {names}")
    params = inspect.signature(fn).parameters
    hints = typing.get_type_hints(fn)
    out = []
    for name in names:
        given = params[name].default
        default = defaults.get(name, REQUIRED if given is inspect.Parameter.empty else given)
        out.append(Option(name, default, hints.get(name, Any), help[name]))
    return tuple(out)


def refuse_unknown_options(what: str, options: dict, known: list[str], flag: str) -> None:
    """Refuse option names outside ``known``, listing them (``what``: e.g. "coder 'omp'";
    ``flag``: the command-line option that picks the method, e.g. ``--coder``)."""
    unknown = sorted(set(options) - set(known))
    if unknown:
        raise InputError(problem(f"options of {what}", f"option names among {known}",
                                 f"unknown {unknown}",
                                 f"Check the spelling, or choose the method these options "
                                 f"belong to ({flag})."))
