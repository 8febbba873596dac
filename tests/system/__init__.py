"""Tests that run the real service as subprocesses on 127.0.0.1."""
