"""``qtally-check``: a thin Hydra entry point around :func:`qtally.check_run.check_environment`."""

from __future__ import annotations

import sys

import hydra
from omegaconf import DictConfig

from ..config.check_schema import register_check_schema
from .console import fail, pre_check_overrides, quiet_libraries, run_reporting_errors

PROGRAM = "qtally-check"


@hydra.main(version_base="1.3", config_path="pkg://qtally.configs", config_name="check")
def _check(cfg: DictConfig) -> None:
    from ..check_run import check_environment

    if cfg.episodes <= 0 or not cfg.probe_seconds > 0:
        fail(PROGRAM, f"episodes={cfg.episodes} and probe_seconds={cfg.probe_seconds} must be positive")
    name, findings = run_reporting_errors(PROGRAM, lambda: check_environment(cfg))
    print(f"{PROGRAM}: {name}")
    width = max(len(f.capability) for f in findings)
    for finding in findings:
        mark = "yes" if finding.present else ("NO " if finding.required else "no ")
        print(f"  {mark}  {finding.capability:<{width}}  {finding.detail}")
    blocking = [f for f in findings if f.required and not f.present]
    if blocking:
        print(f"{PROGRAM}: error: qtally cannot train {name}: {blocking[0].detail}", file=sys.stderr)
        sys.exit(1)
    print(f"verdict: qtally can train {name}")


def main() -> None:
    from ..config.check_schema import CheckConfig
    from ..config.schema import EnvConfig

    quiet_libraries()
    register_check_schema()
    pre_check_overrides(PROGRAM, CheckConfig(env=EnvConfig()), ("env",), "configs/check.yaml")
    _check()
