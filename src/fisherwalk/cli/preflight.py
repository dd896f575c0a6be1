"""What the command checks before any work: every numeric option a whole number in its
range, the output folder (writable, with room, its names free) and the memory the run
will need."""

from __future__ import annotations

import math
from pathlib import Path

from ..base.checks import parse_whole_number
from ..base.files import check_output_folder
from ..engine.memory import check_walk_memory
from ..workflow.plan import MAX_DRAWS
from . import outputs
from .parser import MAX_SEED

__all__ = ["check_numbers", "check_before_work", "output_bytes", "values_per_draw",
           "MAX_CHAINS", "MIN_DRAWS"]

MAX_CHAINS = 10_000
MIN_DRAWS = 4  # R-hat and ESS need 4 draws per chain
_NUMBERS = {"chains": (1, MAX_CHAINS), "draws": (MIN_DRAWS, None), "warmup": (1, None),
            "seed": (0, MAX_SEED), "thin": (1, None), "restarts": (0, None)}


def check_numbers(args) -> None:
    """Every numeric option as a whole number in its range (argparse keeps them as text,
    so that '1e23' and '2.0' get the package's message, exit 2, before any work)."""
    for name, (low, high) in _NUMBERS.items():
        if getattr(args, name, None) is not None:  # None: --draws left to the plan
            text = getattr(args, name)
            text = str(text) if isinstance(text, int) else text  # a default
            setattr(args, name, parse_whole_number(text, f"--{name}",
                                                   f"option --{name}", minimum=low,
                                                   maximum=high))
    if hasattr(args, "dims"):
        args.dims = [parse_whole_number(text, "DIM", "fisherwalk scale DIM", minimum=1)
                     for text in args.dims]


def output_bytes(chains: int, draws: int, dim: int) -> int:
    """About how many bytes the outputs take: draws.npz (draws, log density, acceptance
    in float64), record.json (five d x d matrices at ~25 characters a number) and the
    four figures (a few hundred kB each)."""
    return chains * draws * (dim + 2) * 8 + 125 * dim * dim + 4 * 2**20


def values_per_draw(fn, position) -> int:
    """How many numbers ``fn(position)`` returns (traced, not run); 0 when it cannot be
    traced here (walk() then reports the function's problem)."""
    if fn is None:
        return 0
    import jax

    try:
        shapes = jax.eval_shape(fn, position)
    except Exception:  # noqa: BLE001 - reported by walk() with its own message
        return 0
    return sum(math.prod(leaf.shape) for leaf in jax.tree_util.tree_leaves(shapes))


def check_before_work(args, dim: int, model=None) -> Path:
    """The output folder (a writable folder with room for the outputs) and the memory
    the run needs (with the model's pointwise and derived values), checked before the
    fit."""
    draws = MAX_DRAWS if args.draws is None else args.draws  # a planned run: its budget
    pointwise = derived = 0
    if model is not None:
        if getattr(args, "pointwise", False):
            pointwise = values_per_draw(model.pointwise, model.initial_position)
        derived = values_per_draw(model.derived, model.initial_position)
    check_walk_memory(draws, args.chains, dim, where="options --draws and --chains",
                      todo="pass --draws {draws} or fewer (or fewer --chains); nothing was "
                           "fitted or sampled.", thin=args.thin, pointwise=pointwise,
                      derived=derived)
    out = check_output_folder(args.out, output_bytes(args.chains, draws, dim))
    checkpoint = bool(getattr(args, "checkpoint", False))
    outputs.check_output_names(out, outputs.output_names(args.command, checkpoint=checkpoint))
    if args.command == "demo":
        outputs.check_demo_folder(out)
    return out
