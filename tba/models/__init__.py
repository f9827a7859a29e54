"""Integrable S-matrices: masses, kernels and statistics. Models never iterate."""

from tba.models.base import DiagonalModel
from tba.models.catalog import (
    MODELS,
    MODELS_WITH_COUPLING,
    free_fermion,
    get_model,
    ising_e8,
    lee_yang,
    sinh_gordon,
    user_model,
)

__all__ = ["DiagonalModel", "MODELS", "MODELS_WITH_COUPLING", "free_fermion", "get_model",
           "ising_e8", "lee_yang", "sinh_gordon", "user_model"]
