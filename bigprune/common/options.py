"""What an option means and how an error names it: one budget rule for every command.

A budget (``select --budget``, ``--min-per-class``, ``study --budgets``, the job file's keys,
the Python API) is a *fraction* in (0, 1] only when written with a decimal point or ``%``
(``0.05``, ``1.0``, ``5%``) and a *count* only when written as an integer (``1``, ``5000``).
Python ints are counts, floats fractions, strings follow the written rule.
"""
import math
import re
from dataclasses import dataclass

import numpy as np

from .errors import InputError

BUDGET_RULE = ("a fraction in (0, 1] written with a decimal point or % (0.05, 1.0, 5%) or a "
               "count written as an integer (1, 5000)")
_COUNT = re.compile(r"\d+")
_FRACTION = re.compile(r"(\d+\.\d*|\.\d+)")
_PERCENT = re.compile(r"(\d+(\.\d*)?|\.\d+)%")


class Names:
    """How errors name an option: a command-line flag (``--budget 0.5``), or the job file's
    table and entry (``job.toml [[select]] #2 budget = 0.5``) when ``where`` is given."""

    def __init__(self, where=None):
        self.where = where

    def label(self, key, value):
        """The option and its value as written, to start an error line."""
        if self.where is None:
            return f"--{key.replace('_', '-')} {value}"
        return f"{self.where} {key} = {value!r}"

    def hint(self, key):
        """The option alone, for advice ("raise --budget" / "raise budget")."""
        return f"--{key.replace('_', '-')}" if self.where is None else key


FLAGS = Names()


@dataclass(frozen=True)
class Budget:
    """A parsed budget: exactly one of ``fraction`` and ``count`` is set."""

    fraction: float = None
    count: int = None

    @property
    def number(self):
        """The budget as a JSON number: the fraction (float) or the count (int)."""
        return self.fraction if self.count is None else self.count

    def picks(self, total):
        """Nodes this budget takes out of ``total``: the count, or the fraction rounded (>= 1)."""
        return self.count if self.count is not None else max(1, int(round(self.fraction * total)))

    def describe(self):
        """``{"kind": "fraction"|"count", "value": number}`` for reports."""
        return {"kind": "count" if self.count is not None else "fraction", "value": self.number}


def read_budget(value, key="budget", names=FLAGS):
    """``value`` (int, float or text) as a :class:`Budget` by the one rule; ``InputError`` naming
    ``names.label(key, value)`` otherwise."""
    wrong = f"{names.label(key, value)}: use {BUDGET_RULE}"
    if isinstance(value, (bool, np.bool_)):
        raise InputError(wrong)
    if isinstance(value, (int, np.integer)):
        if value < 1:
            raise InputError(wrong)
        return Budget(count=int(value))
    if isinstance(value, (float, np.floating)):
        return _fraction(float(value), wrong)
    if not isinstance(value, str):
        raise InputError(wrong)
    text = value.strip()
    if _COUNT.fullmatch(text):
        if int(text) < 1:
            raise InputError(wrong)
        return Budget(count=int(text))
    if _FRACTION.fullmatch(text):
        return _fraction(float(text), wrong)
    if _PERCENT.fullmatch(text):
        return _fraction(float(text[:-1]) / 100, wrong)
    raise InputError(wrong)


def _fraction(number, wrong):
    if not math.isfinite(number) or not 0 < number <= 1:
        raise InputError(wrong)
    return Budget(fraction=number)
