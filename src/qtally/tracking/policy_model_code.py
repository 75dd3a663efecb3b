"""Loaded by MLflow when a logged ``policy`` model is opened (models-from-code): defines the model."""

import mlflow

from qtally.tracking.policy_model import TabularPolicyModel

mlflow.models.set_model(TabularPolicyModel())
