"""Reading and checking a comparison file (TOML, formats 1 and 2).

`load_comparison` turns the file into a `Comparison`, collecting every problem it finds into one
`SpecError`; each problem is a `leafcv.errors.Problem` with a code and a location. `check_against_data`
adds the problems that can only be seen once the data are loaded (a grouping with a single level, a
trait that never varies). `describe` writes the summary printed by ``leafcv check``.

Modules: `reading` (the TOML file, syntax errors with their position), `checker` (the `Checker` that
collects problems), `keys` (the file's keys, formats and limits), `sections` (format, [data], [sampler],
[cv], [model], [priors]), `structures` ([[structure]] and parameter entries), `grid` ([[grid]]
expansion), `load` (the whole file), `checks` (against the loaded data), `summary` (`describe` and
its parts; named apart from the function so that ``leafcv.comparison.describe`` is always the function)
and `question` (the question the comparison asks, for the run folder's study record).
The data mapping's own rules are `leafcv.data.mapping`'s, shared with `load_dataset`.
"""
from .checker import Checker
from .checks import check_against_data
from .keys import FORMAT_VERSION, LEAF_TERM, MAX_SEED, MAX_TREEDEPTH_LIMIT, RATIO_TARGET, SUPPORTED_FORMATS
from .load import load_comparison
from .summary import describe, describe_options, describe_param

__all__ = ["FORMAT_VERSION", "SUPPORTED_FORMATS", "LEAF_TERM", "RATIO_TARGET", "MAX_SEED", "MAX_TREEDEPTH_LIMIT",
           "Checker", "load_comparison", "check_against_data", "describe", "describe_options", "describe_param"]
