"""Integrable S-matrices: masses, kernels and statistics. Models never iterate."""

from tba.models.base import DiagonalModel
from tba.models.blocks import HalfBlock
from tba.models.catalog import (
    MODELS,
    MODELS_WITH_COUPLING,
    ModelError,
    ade_model,
    free_fermion,
    get_model,
    ising_e8,
    lee_yang,
    massless_bosons,
    massless_fermion,
    model_names,
    sine_gordon,
    sinh_gordon,
    tricritical_to_ising,
    user_model,
)

__all__ = ["DiagonalModel", "HalfBlock", "MODELS", "MODELS_WITH_COUPLING", "ModelError",
           "ade_model", "free_fermion", "get_model", "ising_e8", "lee_yang", "massless_bosons",
           "massless_fermion", "model_names", "sine_gordon", "sinh_gordon", "tricritical_to_ising",
           "user_model"]
