"""Loaded by MLflow when a logged ``policy`` model is opened (models-from-code): defines the model.

It imports MLflow, numpy and :mod:`qtally_served_policy` (shipped beside it through
``code_paths``), never qtally, so the model loads and serves where qtally is not installed.
"""

import mlflow
import numpy as np

from qtally_served_policy import load_served_policy


class TabularPolicyModel(mlflow.pyfunc.PythonModel):
    """One action per observation row: greedy where training reached the state, the declared fallback elsewhere."""

    # Type hints on predict would switch on MLflow's input validation, which refuses lists
    # of lists; this MLflow class flag says the model validates its input itself.
    _skip_type_hint_validation = True

    def load_context(self, context) -> None:
        self.policy = load_served_policy(context.artifacts["policy"])
        self.rng = np.random.default_rng()  # the uniform fallback's draws; unseeded, so each request draws afresh

    def predict(self, context, model_input, params=None) -> np.ndarray:
        return self.policy.act(model_input, self.rng)


mlflow.models.set_model(TabularPolicyModel())
