"""Selection policies: which check-ins a round accepts.

A policy is a :class:`SelectionPolicy` subclass with one required hook, ``choose``, and one
optional hook, ``rank`` (both declared and documented on the base class, see
:mod:`fleetsim.policies.base`). Every built-in policy (:mod:`fleetsim.policies.builtin`) is
written on this same interface. A plug-in is named in the fleet file as
``package.module:Name`` and built with the file's ``params`` as keyword arguments by
:func:`make_policy` (:mod:`fleetsim.policies.plugins`), which checks it before anything
runs; docs/policies.md has worked examples.
"""

from .base import Candidates, RoundView, SelectionPolicy
from .builtin import BUILTIN_POLICIES, FirstCome, Lottery, QuickFinish, RestedFirst, ShareQuota
from .plugins import MIN_WINDOW_S, make_policy

__all__ = [
    "Candidates",
    "RoundView",
    "SelectionPolicy",
    "FirstCome",
    "Lottery",
    "QuickFinish",
    "ShareQuota",
    "RestedFirst",
    "BUILTIN_POLICIES",
    "MIN_WINDOW_S",
    "make_policy",
]
