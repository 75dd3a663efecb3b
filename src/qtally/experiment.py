"""One training run, end to end: config -> environment -> trainer -> MLflow record.

This is the wiring behind ``qtally-train``. It validates everything it can before a
run is opened (so bad input leaves no run behind), opens the MLflow run, trains with
an :class:`~qtally.tracking.mlflow_sink.MlflowRecorder`, writes the artifacts, and
closes the run as FINISHED, or FAILED/KILLED if anything goes wrong on the way.
"""

from __future__ import annotations

import contextlib
import csv
import os
import signal
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from omegaconf import DictConfig, OmegaConf

from .config.schema import EnvConfig
from .config.validate import ConfigError, schedule_parameters, validate
from .control.schedules import make_schedule
from .control.variants import make_variant
from .envs.factory import EnvironmentConfigError, EnvironmentSpec, TabularEnvironment, make_environment
from .errors import QtallyError
from .policy.table_policy import Fallback
from .tracking.runs import log_config, open_experiment, recorded_run, resolve_tracking_uri
from .tracking.sweep import child_tags, current_sweep
from .control.streams import evaluation_base, evaluation_seeds
from .control.truncation import resolve_step_cap
from .engine.collection import CollectionFailed, CollectSettings
from .trainer import Trainer, TrainingOutcome, TrainingSettings, TrainingStopped, logging_window

__all__ = ["QtallyError", "RunSummary", "run_training", "environment_spec", "bundled_environment_spec"]

@dataclass(frozen=True)
class RunSummary:
    run_id: str
    experiment_id: str
    tracking_uri: str
    final_evaluation: dict
    outcome: TrainingOutcome


def bundled_environment_spec(name: str) -> tuple[EnvironmentSpec, str]:
    """The spec and truncation rule of a shipped ``configs/env/<name>.yaml`` (for scripts and benchmarks)."""
    from importlib import resources

    node = OmegaConf.merge(OmegaConf.structured(EnvConfig), OmegaConf.create((resources.files("qtally.configs") / "env" / f"{name}.yaml").read_text()))
    return environment_spec(node), node.truncation


def environment_spec(env_cfg: DictConfig) -> EnvironmentSpec:
    return EnvironmentSpec(
        id=env_cfg.id,
        kwargs=OmegaConf.to_container(env_cfg.kwargs, resolve=True) if env_cfg.kwargs is not None else {},
        max_episode_steps=env_cfg.max_episode_steps,
        observation_names=list(env_cfg.observation_names) if env_cfg.observation_names else None,
        bins=list(env_cfg.bins) if env_cfg.bins else None,
        low=list(env_cfg.low) if env_cfg.low else None,
        high=list(env_cfg.high) if env_cfg.high else None,
    )


def _exact_probes(environment: TabularEnvironment, gamma: float):
    """Exact optimality metrics where the environment exposes a model; () and a reason otherwise."""
    from .envs.model import NoModelError
    from .envs.model_extraction import model_of
    from .evaluate.exact import ImproperPolicyError, NotConvergedError, greedy_regret, optimal_action_fraction, optimality_gap, value_iteration

    try:
        model = model_of(environment.env)
        if model.n_states != environment.n_states:
            return (), None, "the model's state count does not match the observation table"
        solution = value_iteration(model, gamma)
    except (NoModelError, ImproperPolicyError, NotConvergedError) as exc:
        return (), None, str(exc)

    def probe(q: np.ndarray) -> dict[str, float]:
        gap = optimality_gap(model, q, gamma, v_star=solution.v_star)
        return {
            "optimality_gap": float(gap.gap),
            "greedy_expected_return": float(gap.greedy_start_value),
            "optimal_action_fraction": float(optimal_action_fraction(model, q, solution.q_star)),
            "greedy_regret": float(greedy_regret(model, q, solution.q_star, gamma)),
        }

    return (probe,), (model, solution), None


def _write_q_table_csv(environment: TabularEnvironment, outcome: TrainingOutcome, path: Path) -> Path:
    q, visits, actions = outcome.values.q, outcome.values.visits, outcome.artifact.actions
    with path.open("w", newline="") as stream:
        writer = csv.writer(stream)
        writer.writerow(["state", "observation"] + [f"q_{a}" for a in range(q.shape[1])] + [f"visits_{a}" for a in range(q.shape[1])] + ["greedy_action"])
        for s in np.flatnonzero(visits.sum(axis=1) > 0):
            writer.writerow([int(s), environment.encoder.describe(int(s))] + [f"{x:.6g}" for x in q[s]] + [int(x) for x in visits[s]] + [int(actions[s])])
    return path


def prepare(cfg: DictConfig):
    """Everything that can fail on bad input, done before a run exists."""
    try:
        validate(cfg)
    except ConfigError as exc:
        raise QtallyError(str(exc)) from None
    variant = make_variant(cfg.variant.name, cfg.gamma, cfg.variant.first_visit, cfg.variant.step_size)
    schedule = make_schedule(cfg.schedule.kind, **schedule_parameters(cfg.schedule))
    spec = environment_spec(cfg.env)
    try:
        environment = make_environment(spec)
        evaluation_environment = make_environment(spec)
    except EnvironmentConfigError as exc:
        raise QtallyError(str(exc)) from None
    try:
        policy_fallback(cfg).check_actions(environment.n_actions)
    except ValueError as exc:
        environment.close()
        evaluation_environment.close()
        raise QtallyError(str(exc)) from None
    if variant.needs_start_control and environment.start_control is None:
        environment.close()
        evaluation_environment.close()
        raise QtallyError(
            f"variant=exploring_starts needs an environment whose start state can be set, and {spec.id!r} cannot; "
            "use variant=on_policy or variant=off_policy, or implement start_states()/reset_to() (see DEVELOPERS.md)"
        )
    if cfg.engine == "compiled":  # auto falls back to gym by itself; an explicit request must hold before a run exists
        from .engine.compiled import EngineUnavailable
        from .trainer import choose_engine

        try:
            starts = list(environment.start_control.start_states()) if variant.needs_start_control else []
            choose_engine("compiled", environment, variant, schedule, resolve_step_cap(cfg.env.step_cap, environment.n_states), starts)
        except EngineUnavailable as exc:
            environment.close()
            evaluation_environment.close()
            raise QtallyError(str(exc)) from None
    return variant, schedule, environment, evaluation_environment


def collect_settings(cfg: DictConfig) -> CollectSettings:
    """The ``collect`` block as :class:`CollectSettings` (validated by ``validate``)."""
    collect = cfg.get("collect")
    if collect is None:  # a config recorded before the block existed
        return CollectSettings()
    return CollectSettings(
        workers=collect.workers, batch=collect.batch, backend=collect.backend, address=collect.address, worker_cpus=collect.worker_cpus, timeout=collect.timeout
    )


def policy_fallback(cfg: DictConfig) -> Fallback:
    """The ``policy_fallback`` block as the policy's :class:`Fallback` (validated by ``validate``)."""
    block = cfg.get("policy_fallback") or {}
    return Fallback(rule=block.get("rule", "uniform"), action=block.get("action"))


def run_name(cfg: DictConfig) -> str:
    """``tracking.run_name``, else a readable one: variant, schedule, seed."""
    return cfg.tracking.run_name or f"{cfg.variant.name} {cfg.schedule.kind} seed={cfg.seed}"


def run_training(cfg: DictConfig, progress_factory=None, announce=None) -> RunSummary:
    """Train once and record the run; raises :class:`QtallyError` for input the user can fix.

    With ``resume=<run id>`` the run is continued from its last checkpoint instead (:func:`resume_training`).
    """
    if cfg.get("resume"):
        return resume_training(cfg, progress_factory, announce)
    _check_checkpoint_dir(cfg)
    variant, schedule, environment, evaluation_environment = prepare(cfg)
    from mlflow.tracking import MlflowClient

    from .cli.console import quiet_libraries

    quiet_libraries()
    sweep = current_sweep()
    uri = sweep.tracking_uri if sweep else resolve_tracking_uri(cfg.tracking.uri)
    experiment = open_experiment(uri, cfg.tracking.experiment)
    probes, exact, exact_reason = _exact_probes(environment, cfg.gamma) if cfg.exact else ((), None, "exact=false")

    tags = {
        "env": cfg.env.id,
        "variant": cfg.variant.name,
        "schedule": cfg.schedule.kind,
        "seed": str(cfg.seed),
        "qtally.exact_metrics": "yes" if exact else f"no: {exact_reason}"[:250],
        **(child_tags(cfg, sweep) if sweep else {}),
    }
    client = MlflowClient()
    try:
        with recorded_run(cfg, run_name(cfg), tags) as run_id:
            if announce:
                announce(run_id)
            outcome = _train_and_record(cfg, client, run_id, variant, schedule, environment, evaluation_environment, probes, exact, progress_factory)
    finally:
        environment.close()
        evaluation_environment.close()
    return RunSummary(run_id=run_id, experiment_id=experiment.experiment_id, tracking_uri=uri, final_evaluation=outcome.final_evaluation, outcome=outcome)


def _check_checkpoint_dir(cfg: DictConfig) -> None:
    """A checkpoint that cannot be written would be found out only when it is needed: try now."""
    folder = Path(cfg.checkpoint_dir)
    missing = [folder, *folder.parents]
    missing = [p for p in missing if not p.exists()]
    try:
        folder.mkdir(parents=True, exist_ok=True)
        with tempfile.NamedTemporaryFile(dir=folder, prefix=".write-check-"):
            pass
    except OSError as exc:
        raise QtallyError(f"checkpoint_dir={cfg.checkpoint_dir!r} cannot be written ({exc.strerror}); give a folder you can write to") from None
    for made in missing:  # leave no empty folders behind: a checkpoint creates them again when it is written
        with contextlib.suppress(OSError):
            made.rmdir()


def checkpoint_path(cfg: DictConfig, run_id: str) -> Path:
    return Path(cfg.checkpoint_dir) / run_id / "trainer_state.npz"


def resume_training(cfg: DictConfig, progress_factory=None, announce=None) -> RunSummary:
    """Continue run ``cfg.resume`` from its last checkpoint, with the config it was started with.

    The checkpoint is the local file under ``checkpoint_dir`` if there is one, else the run's
    ``checkpoint/trainer_state.npz`` artifact. Metrics the store already holds for a step are
    not sent again, so the episodes replayed after the checkpoint leave each step once.
    """
    import mlflow
    from mlflow.tracking import MlflowClient

    from .control.trainer_state import TrainerState, TrainerStateError
    from .cli.console import quiet_libraries

    quiet_libraries()
    run_id = str(cfg.resume)
    sweep = current_sweep()
    uri = sweep.tracking_uri if sweep else resolve_tracking_uri(cfg.tracking.uri)
    mlflow.set_tracking_uri(uri)
    client = MlflowClient(uri)
    try:
        run = client.get_run(run_id)
    except Exception:
        raise QtallyError(f"resume={run_id}: no run with this id in {uri}; give a run id from this store, or its tracking.uri") from None
    if run.info.status == "FINISHED":
        raise QtallyError(f"resume={run_id}: the run already finished; there is nothing to continue")
    with tempfile.TemporaryDirectory(prefix="qtally-resume-") as scratch:
        try:
            run_cfg = OmegaConf.load(client.download_artifacts(run_id, "config/resolved_config.yaml", scratch))
        except Exception:
            raise QtallyError(f"resume={run_id}: the run has no recorded config (config/resolved_config.yaml), so it cannot be continued") from None
        OmegaConf.update(run_cfg, "resume", None, force_add=True)
        OmegaConf.update(run_cfg, "checkpoint_dir", cfg.checkpoint_dir, force_add=True)
        OmegaConf.update(run_cfg, "tracking.uri", uri, force_add=True)
        OmegaConf.update(run_cfg, "quiet", cfg.quiet, force_add=True)
        local = checkpoint_path(run_cfg, run_id)
        if not local.exists():
            try:
                local = Path(client.download_artifacts(run_id, "checkpoint/trainer_state.npz", scratch))
            except Exception:
                raise QtallyError(
                    f"resume={run_id}: no checkpoint, neither {checkpoint_path(run_cfg, run_id)} nor the run's checkpoint/ artifact "
                    "(it stopped before its first checkpoint; set checkpoint_every for the next run)"
                ) from None
        try:
            state = TrainerState.load(local)
        except TrainerStateError as exc:
            raise QtallyError(f"resume={run_id}: {exc}") from None
    _check_checkpoint_dir(run_cfg)
    variant, schedule, environment, evaluation_environment = prepare(run_cfg)
    experiment = client.get_experiment(run.info.experiment_id)
    mlflow.set_experiment(experiment_id=experiment.experiment_id)
    probes, exact, _ = _exact_probes(environment, run_cfg.gamma) if run_cfg.exact else ((), None, "exact=false")
    already = {(key, metric.step) for key in run.data.metrics for metric in client.get_metric_history(run_id, key)}
    try:
        with recorded_run(run_cfg, None, {"qtally.resumed_at_episode": str(state.episode)}, resume_run_id=run_id):
            if announce:
                announce(run_id)
            outcome = _train_and_record(run_cfg, client, run_id, variant, schedule, environment, evaluation_environment, probes, exact, progress_factory, state=state, already_logged=already)
    finally:
        environment.close()
        evaluation_environment.close()
    return RunSummary(run_id=run_id, experiment_id=experiment.experiment_id, tracking_uri=uri, final_evaluation=outcome.final_evaluation, outcome=outcome)


STORE_RETRIES, STORE_RETRY_PAUSE = 6, 5.0  # at the end of a run, wait up to about 30 s for a store that went away


def _send_or_keep(recorder, trainer: Trainer, cfg: DictConfig, run_id: str) -> None:
    """Send what is still queued; if the store stays away, keep the whole record in a checkpoint and say how to send it."""
    import time

    for attempt in range(STORE_RETRIES):
        recorder.flush()
        if not recorder.unsent:
            return
        time.sleep(STORE_RETRY_PAUSE)
    path = trainer.state.save(checkpoint_path(cfg, run_id))
    raise QtallyError(
        f"the tracking store stopped answering ({recorder.last_error}); {recorder.unsent} metric values were not sent. "
        f"The run's whole record is in {path}: when the store answers again, qtally-train resume={run_id} sends what is missing and finishes the run"
    )


@contextlib.contextmanager
def _stop_on_signals(trainer: Trainer):
    """SIGINT and SIGTERM stop training after the current episode, with a checkpoint; a second SIGINT stops at once."""
    def request(signum, frame):
        if trainer.stop_requested and signum == signal.SIGINT:
            raise KeyboardInterrupt
        trainer.request_stop(signal.Signals(signum).name)

    previous = {}
    try:
        for signum in (signal.SIGINT, signal.SIGTERM):
            previous[signum] = signal.signal(signum, request)
    except ValueError:  # not the main thread (some launchers): signals keep their default meaning
        pass
    try:
        yield
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)


def _train_and_record(cfg, client, run_id, variant, schedule, environment, evaluation_environment, probes, exact, progress_factory, state=None, already_logged=None) -> TrainingOutcome:
    """Inside the open run: train with the batching recorder, then write the artifacts and the model."""
    import mlflow

    from .envs.pictures import policy_pictures, state_values
    from .envs.rollout_animation import rollout_animation
    from .plots import learning_curve, shared_value_range
    from .tracking.mlflow_sink import SEND_EVERY_SECONDS, MlflowRecorder
    from .tracking.policy_model import log_policy_model

    if state is None:
        with tempfile.TemporaryDirectory(prefix="qtally-run-") as scratch:
            log_config(cfg, Path(scratch))  # first, so a run stopped early can be resumed with its config
    # A run resumed from before tracking.sqlite_rows existed writes rows too.
    direct = cfg.tracking.get("sqlite_rows", True)
    recorder = MlflowRecorder(client, run_id, already_logged=already_logged, tracking_uri=mlflow.get_tracking_uri() if direct else None,
                              send_every=cfg.tracking.get("send_every", SEND_EVERY_SECONDS))

    def checkpoint(trainer: Trainer) -> Path:
        path = trainer.state.save(checkpoint_path(cfg, run_id))
        with contextlib.suppress(Exception):  # the local file is the checkpoint; the artifact is a copy where the store can take it
            client.log_artifact(run_id, str(path), "checkpoint")
        return path

    settings = TrainingSettings(
        episodes=cfg.episodes,
        seed=cfg.seed,
        log_every=logging_window(cfg.log_every, cfg.episodes),
        eval_every=cfg.eval_every,
        eval_episodes=cfg.eval_episodes,
        snapshot_every=cfg.snapshot_every,
        truncation=cfg.env.truncation,
        initial_value=cfg.initial_value,
        step_cap=cfg.env.step_cap,
        eval_seed=cfg.eval_seed,
        eval_replay=cfg.get("eval_replay", "changed"),  # a run resumed from before the key existed
        engine=cfg.engine,
        checkpoint_every=cfg.get("checkpoint_every", 0),
        collect=collect_settings(cfg),
    )
    mlflow.set_tags({"qtally.log_every": f"{settings.log_every}" + (" (auto)" if cfg.log_every == "auto" else ""), "qtally.metric_writer": recorder.writer})
    progress = progress_factory(cfg.episodes) if progress_factory else None
    trainer = Trainer(
        environment,
        variant,
        schedule,
        settings,
        recorder=recorder,
        evaluation_environment=evaluation_environment,
        probes=probes,
        progress=progress,
        facts={"gamma": cfg.gamma, "variant": cfg.variant.name, "seed": cfg.seed},
        fallback=policy_fallback(cfg),
        state=state,
        checkpoint=checkpoint,
    )
    if state is not None:  # a resumed run: what the checkpoint holds but the store lacks is sent first
        for name, series in state.history.items():
            for step, value in series:
                recorder.log_metrics({name: value}, step)
    try:
        with _stop_on_signals(trainer):
            outcome = trainer.run()
            _send_or_keep(recorder, trainer, cfg, run_id)
    except CollectionFailed as failure:
        where = f"its last whole batch is in {failure.checkpoint}; " if failure.checkpoint else ""
        raise QtallyError(f"{failure}; the run was closed as FAILED; {where}continue with: qtally-train resume={run_id}") from None
    except TrainingStopped as stopped:
        where = f"its checkpoint: {stopped.checkpoint}; " if stopped.checkpoint else ""
        stopped.hint = f"stopped by {getattr(trainer, 'stop_reason', 'a stop request')} at episode {stopped.episode}; the run was closed as KILLED; {where}continue with: qtally-train resume={run_id}"
        raise
    finally:
        if progress is not None:
            progress.close()
        if recorder.unsent and recorder.rows is not None:  # a run that failed: what it measured still goes into a SQLite store (a server may make log_batch wait minutes)
            recorder.flush()
    mlflow.log_metric("visited_state_share", outcome.artifact.visited_share)
    mlflow.set_tag("qtally.engine", f"{outcome.engine}: {outcome.engine_reason}"[:250])
    mlflow.set_tag("qtally.evaluation", outcome.evaluation_note[:250])
    if outcome.engine == "compiled":
        mlflow.log_metric("engine_compile_seconds", outcome.compile_seconds)
    with tempfile.TemporaryDirectory(prefix="qtally-run-") as scratch:
        scratch_dir = Path(scratch)
        policy_path = outcome.artifact.save(scratch_dir / "policy.npz")
        mlflow.log_artifact(str(policy_path), "policy_file")
        mlflow.log_artifact(str(_write_q_table_csv(environment, outcome, scratch_dir / "q_table.csv")), "tables")
        # Exploring starts act greedily after a random start pair: no schedule to name.
        acting = "greedy after a random start pair" if cfg.variant.name == "exploring_starts" else f"schedule {cfg.schedule.kind}"
        title = f"{cfg.env.id} · {cfg.variant.name} · {acting} · seed {cfg.seed}"
        mlflow.log_artifact(str(learning_curve(outcome.history, scratch_dir / "learning_curve.png", title)), "plots")
        # The learned and the optimal map share one colour scale, so equal colours mean equal values.
        learned_values = state_values(outcome.values.q, outcome.values.visits)
        value_range = shared_value_range(learned_values, exact[1].v_star) if exact else None
        pictures = policy_pictures(environment, outcome.values.q, outcome.artifact.actions, scratch_dir / "maps", "learned", visits=outcome.values.visits, value_range=value_range)
        if exact:
            model, solution = exact
            pictures += policy_pictures(environment, solution.q_star, solution.policy, scratch_dir / "maps", "optimal", values=solution.v_star, value_range=value_range)
        for picture in pictures:
            mlflow.log_artifact(str(picture), "plots")
        if cfg.rollout_animation:
            animation, note = rollout_animation(environment.spec, outcome.artifact.actions, scratch_dir / "rollout.gif", seed=int(evaluation_seeds(evaluation_base(cfg.seed, cfg.eval_seed), 1)[0]))
            mlflow.set_tag("qtally.rollout_animation", note)
            if animation is not None:
                mlflow.log_artifact(str(animation), "plots")
        if cfg.tracking.log_model:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # MLflow nags for an input example; the model metadata describes the input
                log_policy_model(policy_path, outcome.artifact)
    return outcome
