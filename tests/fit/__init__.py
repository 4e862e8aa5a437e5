"""Tests of tracer.fit."""
