"""Shared fixtures: tiny seeded checkpoints that the tests build themselves."""
import pytest


def pytest_configure(config):
    config.addinivalue_line("markers", "slow: real-model tests (seconds to minutes); run in CI too")
