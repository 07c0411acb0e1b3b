"""Analyses the field runs on pooled maps, built on selections: encoding models scored per voxel."""

from __future__ import annotations

from ._encoding import EncodingScores, concept_descriptors, encoding_scores

__all__ = ["EncodingScores", "concept_descriptors", "encoding_scores"]
