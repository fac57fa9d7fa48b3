"""Commissioning toolkit: record, train, evaluate, replay."""
