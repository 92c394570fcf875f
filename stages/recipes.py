"""A stored recipe between the options given and the defaults.

A search (``stages.search``) stores its winner as a recipe (``workspace/trials.py``). From
then on the train options are resolved (``stages.settings.resolve``, the train stage and the
preflight) with the latest recipe found on the same records for every option
left at its declared default, and the pool stage pools a dictionary trained from a recipe
the recipe's way; the encode stage already codes with the dictionary's own coder. So the
order is: an explicit option, then the recipe, then the declared (or shape) default.

"Left at its declared default" is read from the value: an option equal to its declaration's
default yields to the recipe (give ``--atoms 128`` when the default is 128 and a recipe says
32, and the recipe's 32 is used). Delete nothing to undo a recipe: store a new one, or give
the options explicitly.
"""

from __future__ import annotations

import dataclasses
from typing import Any, TypeVar

from .options import PoolOptions, TrainOptions
from .workspace.trials import recipes

__all__ = ["recipe_for", "with_recipe", "RECIPE_FIELDS"]

Options = TypeVar("Options", TrainOptions, PoolOptions)

#: Option fields a recipe sets, per options class.
RECIPE_FIELDS = {
    TrainOptions: ("n_atoms", "patch_size", "stride", "method", "coder", "coder_options",
                   "sample_patches", "preprocessing"),
    PoolOptions: ("regions", "reduce"),
}


def recipe_for(ws: Any, records: str) -> dict | None:
    """The latest complete recipe found by a search on ``data/<records>``, or None."""
    found = [r for r in recipes(ws) if r.get("source", {}).get("records") == records]
    return found[-1] if found else None


def _values(configuration: dict) -> dict[str, Any]:
    """A recipe's configuration as option values."""
    def axes(value):
        return None if value is None else tuple(value)

    return {"n_atoms": int(configuration["n_atoms"]), "patch_size": axes(configuration["patch_size"]),
            "stride": axes(configuration["stride"]), "method": configuration["method"],
            "coder": configuration["coder"], "coder_options": dict(configuration["coder_options"]),
            "sample_patches": int(configuration["sample_patches"]),
            "preprocessing": {"remove_mean": bool(configuration["normalise"]),
                              "contrast": bool(configuration["normalise"]),
                              "whiten": bool(configuration["whiten"])},
            "regions": axes(configuration["regions"]), "reduce": configuration["reduce"]}


def with_recipe(options: Options, recipe: dict | None) -> Options:
    """``options`` with every recipe field left at its declared default set from the recipe.

    Parameters
    ----------
    options : TrainOptions or PoolOptions
    recipe : dict or None
        A recipe entry (``workspace.trials.current_recipe``); None changes nothing.

    Returns
    -------
    TrainOptions or PoolOptions
        A new object (checked when made), or ``options`` itself without a recipe.
    """
    if recipe is None:
        return options
    values = _values(recipe["configuration"])
    defaults = type(options)()
    changes = {name: values[name] for name in RECIPE_FIELDS[type(options)]
               if getattr(options, name) == getattr(defaults, name)}
    # Values that belong together: the recipe's coder options only with its coder, its
    # stride only with its patch size.
    if "coder_options" in changes and options.coder != values["coder"] and "coder" not in changes:
        del changes["coder_options"]
    if "stride" in changes and "patch_size" not in changes:
        del changes["stride"]
    return dataclasses.replace(options, **changes) if changes else options
