"""Absorbing layers (CAP or mask) per face, and CAP strength tuning."""
from .layers import Absorber, FaceLayer, face_names
from .tuning import cap_profile, layer_scattering, return_probability, tune_cap_strength

__all__ = ["Absorber", "FaceLayer", "face_names", "cap_profile", "layer_scattering", "return_probability",
           "tune_cap_strength"]
