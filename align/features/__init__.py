"""Frozen image features, cached on disk: the tower runs once per image and fingerprint, never per step.

A cache entry is a folder ``<root>/<digest>/`` named by a hash of its fingerprint.

- ``fingerprint``: the identity of an entry (what its numbers depend on), its digest, how two differ;
- ``cache``: reading an entry (``FeatureSet``, ``load_feature_cache``);
- ``decode``: images to the plain and augmented pixel views a build embeds;
- ``build``: writing an entry (the tower pass in chunks, the lock, resuming an interrupted build);
- ``stored``: the stored vectors ``align pack --vectors`` wrote as entries, checked against a tower;
- ``sides``: a split's features as a recipe wants them (tower cache or stored vectors), and every
  cache a recipe needs, built ahead of training.

Views: view 0 is the tower's own (evaluation) preprocessing; views 1..K-1 are seeded augmented
crops. Which view a training row shows in an epoch is the loop's business (``align.training.data``).
"""
from .build import ensure_feature_cache, image_features
from .cache import BuildReport, FeatureSet, load_feature_cache
from .decode import augmented_view, training_transform
from .fingerprint import (AUGMENTATION, FORMAT_VERSION, cache_root, feature_fingerprint, fingerprint_changes,
                          fingerprint_digest)
from .sides import ImageSide, build_recipe_features, recipe_feature_sets, split_features, trained_image_side
from .stored import (CHECK_MIN_COSINE, check_stored_vectors, gallery_stored_features, load_stored_features,
                     stored_entry)

__all__ = ["AUGMENTATION", "CHECK_MIN_COSINE", "FORMAT_VERSION", "BuildReport", "FeatureSet", "ImageSide",
           "augmented_view", "build_recipe_features", "cache_root", "check_stored_vectors", "ensure_feature_cache",
           "feature_fingerprint", "fingerprint_changes", "fingerprint_digest", "gallery_stored_features", "image_features",
           "load_feature_cache",
           "load_stored_features", "recipe_feature_sets", "split_features", "stored_entry", "trained_image_side",
           "training_transform"]
