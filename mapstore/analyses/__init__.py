"""Analyses the field runs on pooled maps, built on selections: encoding models scored per voxel, and
study-level maps combined across studies (image-based meta-analysis)."""

from __future__ import annotations

from ._encoding import EncodingScores, concept_descriptors, encoding_scores
from ._pooled import (METHODS, PooledMaps, StudyMaps, combine, fdr_threshold, pool, pool_maps, study_maps,
                      variance_maps, verify_pooled, write_pooled)

__all__ = ["EncodingScores", "concept_descriptors", "encoding_scores", "METHODS", "PooledMaps", "StudyMaps",
           "combine", "fdr_threshold", "pool", "pool_maps", "study_maps", "variance_maps", "verify_pooled",
           "write_pooled"]
