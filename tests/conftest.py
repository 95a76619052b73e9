"""Shared test setup: the process-wide JAX options every command and API call sets (harness.configure)."""

from __future__ import annotations

import harness

harness.configure()
