"""``qtally-compare``: a thin Hydra entry point around :func:`qtally.compare_run.run_comparison`."""

from __future__ import annotations

import sys

import hydra
from omegaconf import DictConfig

from ..config.compare_schema import register_compare_schema
from .console import pre_check_overrides, quiet_libraries, run_reporting_errors

PROGRAM = "qtally-compare"


@hydra.main(version_base="1.3", config_path="pkg://qtally.configs", config_name="compare")
def _compare(cfg: DictConfig) -> None:
    from ..compare_run import run_comparison
    from ..evaluate.comparison_report import terminal_report

    summary = run_reporting_errors(PROGRAM, lambda: run_comparison(cfg))
    if cfg.quiet:
        print(summary.recorded_in or cfg.output_dir)  # quiet: where the comparison lives, for scripts
        return
    print(terminal_report(summary.comparison, summary.context))
    print()
    print(f"files: {', '.join(str(p) for p in summary.files)}")
    if summary.recorded_in:
        where = "the sweep's parent run" if summary.recorded_in_parent else f"a new run in experiment {cfg.tracking.experiment}"
        print(f"logged under comparison/ to {where} {summary.recorded_in}")


def quote_filter(arguments: list[str]) -> list[str]:
    r"""Wrap an unquoted ``filter=`` value in quotes for Hydra's override parser.

    An MLflow filter has spaces, ``=`` and quotes of its own, and a shell strips the outer
    quotes a user types (``filter="tags.env = 'x'"`` arrives as ``filter=tags.env = 'x'``),
    which Hydra cannot parse. A value already in quotes is left as it is.

    >>> quote_filter(["filter=tags.env = 'x'", "threshold=1"])
    ['filter="tags.env = \'x\'"', 'threshold=1']
    >>> quote_filter(['filter="tags.env = \'x\'"'])
    ['filter="tags.env = \'x\'"']
    """
    quoted = []
    for argument in arguments:
        key, _, value = argument.partition("=")
        if key == "filter" and value and value[0] not in "'\"":
            argument = 'filter="' + value.replace('"', '\\"') + '"'  # Hydra: \" inside double quotes
        quoted.append(argument)
    return quoted


def main() -> None:
    from ..config.compare_schema import CompareConfig

    sys.argv[1:] = quote_filter(sys.argv[1:])
    quiet_libraries()
    register_compare_schema()
    pre_check_overrides(PROGRAM, CompareConfig(), (), "configs/compare.yaml")
    _compare()
