"""Vocabulary and training: vocabularies, the feature encoder, the entity-embedding network and its trainer."""
