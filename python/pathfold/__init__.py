"""pathfold from Python: prices exotic equity payoffs written in pathfold's payoff language.

Every function returns what the command line's ``--format json`` prints, as a dict (or a
list): the same keys, the same numbers bit for bit. Errors raise :class:`PathfoldError`,
whose message starts with ``file:line:col:`` when the problem is in a file.

Partial runs (:func:`price_part`) and :func:`merge` let any pool of workers share one
run: the merged result is bit for bit the single run's.
"""

import json
import os

from . import _pathfold
from ._pathfold import PathfoldError

__all__ = ["PathfoldError", "price", "price_text", "check", "compare", "price_part", "merge"]
__version__ = _pathfold.__version__

DEFAULT_PATHS = 200_000
DEFAULT_SEED = 1


def _sets(set):
    """``{"coupon": "2.5%"}`` as the command line's ``--set coupon=2.5%``."""
    if set is None:
        return []
    if not isinstance(set, dict):
        raise TypeError("set must be a dict of parameter names to values, e.g. {'coupon': '2.5%'}")
    return [f"{name}={value}" for name, value in set.items()]


def _path(p):
    return None if p is None else os.fspath(p)


def price(file, *, market=None, paths=DEFAULT_PATHS, seed=DEFAULT_SEED, set=None, antithetic=True,
          control_variates=True, sampler="random"):
    """Prices a payoff file: the dict of ``pathfold price FILE --format json``. ``sampler``
    is ``"random"`` or ``"sobol"``, as the command line's ``--sampler``."""
    return json.loads(_pathfold.price(os.fspath(file), _path(market), paths, seed, _sets(set), antithetic,
                                      control_variates, sampler))


def price_text(text, *, market=None, name="<text>", paths=DEFAULT_PATHS, seed=DEFAULT_SEED, set=None,
               antithetic=True, control_variates=True, sampler="random"):
    """Prices a payoff given as text. ``name`` stands for it in messages; a market file the
    payoff names is looked for in the current folder unless ``market`` is given."""
    return json.loads(_pathfold.price_text(text, _path(market), name, paths, seed, _sets(set), antithetic,
                                           control_variates, sampler))


def check(folder="payoffs/validation", *, paths=DEFAULT_PATHS, seed=DEFAULT_SEED):
    """Prices the validation set against its closed forms: ``pathfold check --format json``."""
    return json.loads(_pathfold.check(os.fspath(folder), paths, seed))


def compare(prices, files=(), *, max_z=3.0, market=None, paths=DEFAULT_PATHS, seed=DEFAULT_SEED, set=None,
            antithetic=True, control_variates=True, sampler="random"):
    """Compares a price list (CSV) with pathfold's prices: ``pathfold compare --format json``."""
    return json.loads(_pathfold.compare(os.fspath(prices), [os.fspath(f) for f in files], max_z, _path(market),
                                        paths, seed, _sets(set), antithetic, control_variates, sampler))


def price_part(file, part, *, market=None, paths=DEFAULT_PATHS, seed=DEFAULT_SEED, set=None, antithetic=True,
               control_variates=True):
    """Runs part ``part`` of a run of one payoff: ``(K, N)`` or ``"K/N"``, K from 1 to N.
    Returns the partial result (a dict, the file ``pathfold price FILE --part K/N`` writes)."""
    if isinstance(part, tuple):
        part = "%d/%d" % part
    return json.loads(_pathfold.price_part(os.fspath(file), str(part), _path(market), paths, seed, _sets(set),
                                           antithetic, control_variates))


def merge(parts):
    """Merges the partial results of one run, in any order: dicts from :func:`price_part`,
    or paths of files ``pathfold price --part`` wrote. Returns the full run's result, bit
    for bit that of :func:`price` with the same options."""
    texts, names = [], []
    for i, part in enumerate(parts):
        if isinstance(part, dict):
            texts.append(json.dumps(part))
            names.append("parts[%d]" % i)
        else:
            with open(part, encoding="utf-8") as f:
                texts.append(f.read())
            names.append(os.fspath(part))
    return json.loads(_pathfold.merge(texts, names))
