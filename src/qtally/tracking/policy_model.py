"""The learned greedy policy as an MLflow pyfunc model.

``mlflow.pyfunc.load_model("runs:/<run_id>/policy").predict(observations)`` returns one
action per row. Observations are a 2-D batch in the environment's own terms: one
integer column for ``Discrete``, the parts as columns for ``Tuple``/``MultiDiscrete``,
the raw vector for ``Box``; a numpy array, a list of lists and a DataFrame all work.

The model is logged as code (MLflow's models-from-code), so loading it runs
:mod:`qtally.tracking.policy_model_code` and reads the policy file with
``allow_pickle=False``: nothing is unpickled. Its signature states the output (one
int64 action per row); the input layout (column names, count, dtype) is in the model
metadata and is checked by :meth:`TabularPolicyModel.predict`. The input side is not
declared as an MLflow schema because MLflow's schema enforcement accepts either
arrays or named columns but never a plain list of lists, which users asked for.
"""

from __future__ import annotations

from pathlib import Path

import mlflow
import numpy as np
from mlflow.models.signature import ModelSignature
from mlflow.types.schema import Schema, TensorSpec

from ..policy.artifact import PolicyArtifact, load_policy

__all__ = ["TabularPolicyModel", "log_policy_model", "input_layout"]


class TabularPolicyModel(mlflow.pyfunc.PythonModel):
    # Type hints on predict would switch on MLflow's input validation, which refuses lists
    # of lists (see the module docstring); this MLflow class flag says we validate ourselves
    # and keeps MLflow from warning about the missing hints on every import.
    _skip_type_hint_validation = True

    def load_context(self, context) -> None:
        self.artifact = load_policy(context.artifacts["policy"])
        self.encoder = self.artifact.encoder()

    def predict(self, context, model_input, params=None) -> np.ndarray:
        index = self.encoder.encode_batch(model_input)
        return self.artifact.actions[index]


def input_layout(artifact: PolicyArtifact) -> dict:
    encoder = artifact.encoder()
    kind = artifact.signature["observation"]["kind"]
    return {
        "observation_columns": list(encoder.names),
        "observation_dtype": "float64" if kind == "bins" else "int64",
        "observation_kind": kind,
        "env_id": artifact.signature.get("env_id"),
    }


def log_policy_model(artifact_path: Path, artifact: PolicyArtifact, name: str = "policy"):
    """Log the policy file as a pyfunc model in the active run."""
    import qtally

    signature = ModelSignature(inputs=None, outputs=Schema([TensorSpec(np.dtype("int64"), (-1,), name="action")]))
    code = Path(__file__).with_name("policy_model_code.py")
    return mlflow.pyfunc.log_model(
        name=name,
        python_model=str(code),
        artifacts={"policy": str(artifact_path)},
        signature=signature,
        metadata=input_layout(artifact),
        pip_requirements=[f"qtally=={qtally.__version__}", f"numpy=={np.__version__}", f"mlflow=={mlflow.__version__}"],
    )
