"""Fixtures for the service tests (defined in helpers.py, shared here)."""

from tests.service.helpers import cancer_pool, digits_pool, harness, harness_factory

__all__ = ["cancer_pool", "digits_pool", "harness", "harness_factory"]
