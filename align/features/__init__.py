"""Frozen image features, cached on disk: the tower runs once per image and fingerprint, never per step.

A cache entry is a folder ``<root>/<digest>/`` named by a hash of its fingerprint.

- ``fingerprint``: the identity of an entry (what its numbers depend on), its digest, how two differ;
- ``cache``: reading an entry (``FeatureSet``, ``load_feature_cache``);
- ``decode``: images to the plain and augmented pixel views a build embeds;
- ``build``: writing an entry (the tower pass in chunks, the lock, resuming an interrupted build).

Views: view 0 is the tower's own (evaluation) preprocessing; views 1..K-1 are seeded augmented
crops. Which view a training row shows in an epoch is the loop's business (``align.training.data``).
"""
from .build import build_recipe_features, ensure_feature_cache, image_features, recipe_feature_sets
from .cache import BuildReport, FeatureSet, load_feature_cache
from .decode import augmented_view, training_transform
from .fingerprint import (AUGMENTATION, FORMAT_VERSION, cache_root, feature_fingerprint, fingerprint_changes,
                          fingerprint_digest)

__all__ = ["AUGMENTATION", "FORMAT_VERSION", "BuildReport", "FeatureSet", "augmented_view", "build_recipe_features",
           "cache_root", "ensure_feature_cache", "feature_fingerprint", "fingerprint_changes", "fingerprint_digest",
           "image_features", "load_feature_cache", "recipe_feature_sets", "training_transform"]
