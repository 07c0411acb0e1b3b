"""Analyses the field runs on pooled maps, built on selections: encoding models scored per voxel, and
study-level maps combined across studies (image-based meta-analysis)."""

from __future__ import annotations

from ._conjunction import Conjunction, conjunction
from ._encoding import EncodingScores, concept_descriptors, encoding_scores
from ._pooled import (DEFAULT_METHOD, METHODS, Z_CAP, PooledMaps, StudyMaps, combine, fdr_threshold, one_sample, pool,
                      pool_maps, study_maps, variance_maps, verify_pooled, write_pooled)
from ._record import PooledRecord, PooledSource

__all__ = ["Conjunction", "conjunction", "EncodingScores", "concept_descriptors", "encoding_scores", "METHODS",
           "DEFAULT_METHOD", "Z_CAP", "one_sample", "PooledMaps", "PooledRecord", "PooledSource", "StudyMaps",
           "combine", "fdr_threshold", "pool", "pool_maps", "study_maps", "variance_maps", "verify_pooled",
           "write_pooled"]
