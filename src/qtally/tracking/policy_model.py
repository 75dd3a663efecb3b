"""The learned greedy policy as an MLflow pyfunc model that needs only numpy and MLflow.

``mlflow.pyfunc.load_model("runs:/<run_id>/policy").predict(observations)`` returns one
action per row. Observations are a 2-D batch in the environment's own terms: one
integer column for ``Discrete``, the parts as columns for ``Tuple``/``MultiDiscrete``,
the raw vector for ``Box``; a numpy array, a list of lists and a DataFrame (columns by
name) all work. States training never reached get the policy's declared fallback.

The model is logged as code (MLflow's models-from-code): loading it runs
``policy_model_code.py``, which uses :mod:`qtally.policy.qtally_served_policy`, a
numpy-only reader and encoder shipped with the model through ``code_paths``. Neither
imports qtally, and the requirements list only numpy and MLflow, so
``mlflow models serve`` works where qtally is not installed. The policy file is read
with ``allow_pickle=False`` and checked against its checksum: nothing is unpickled.

Its signature states the output (one int64 action per row); the input layout (column
names, count, dtype) is in the model metadata and is checked by the model itself. The
input side is not declared as an MLflow schema because MLflow's schema enforcement
accepts either arrays or named columns but never a plain list of lists.
"""

from __future__ import annotations

import sys
from pathlib import Path

import mlflow
import numpy as np
from mlflow.models.signature import ModelSignature
from mlflow.types.schema import Schema, TensorSpec

from ..policy.artifact import PolicyArtifact
from ..policy import qtally_served_policy

__all__ = ["log_policy_model", "input_layout", "served_requirements"]

_HERE = Path(__file__).parent
SERVED_MODULE = Path(qtally_served_policy.__file__)
MODEL_CODE = _HERE / "policy_model_code.py"


def served_requirements() -> list[str]:
    """What the model needs to load: packages a public index has, never qtally."""
    return [f"numpy=={np.__version__}", f"mlflow=={mlflow.__version__}"]


def input_layout(artifact: PolicyArtifact) -> dict:
    encoder = artifact.encoder()
    kind = artifact.signature["observation"]["kind"]
    return {
        "observation_columns": list(encoder.names),
        "observation_dtype": "float64" if kind == "bins" else "int64",
        "observation_kind": kind,
        "env_id": artifact.signature.get("env_id"),
        "fallback": artifact.fallback.to_dict(),
        "visited_state_share": artifact.visited_share,
    }


def log_policy_model(artifact_path: Path, artifact: PolicyArtifact, name: str = "policy"):
    """Log the policy file as a pyfunc model in the active run, with its numpy-only reader beside it."""
    signature = ModelSignature(inputs=None, outputs=Schema([TensorSpec(np.dtype("int64"), (-1,), name="action")]))
    # MLflow runs the model code once while logging; the reader it imports by its shipped
    # name must resolve then too (a loaded model finds it on the path MLflow adds).
    sys.modules.setdefault("qtally_served_policy", qtally_served_policy)
    return mlflow.pyfunc.log_model(
        name=name,
        python_model=str(MODEL_CODE),
        artifacts={"policy": str(artifact_path)},
        code_paths=[str(SERVED_MODULE)],
        signature=signature,
        metadata=input_layout(artifact),
        pip_requirements=served_requirements(),
    )
