"""Invented demo scenarios with seeded data, shipped with walktune as ``walktune.demo_models``.

Each file is a model file (docs/models.md): run one with
``walktune tune demo_models/<file>.py:<function>`` from the repository, or
``walktune demo`` from any install.
"""
