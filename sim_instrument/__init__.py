"""Simulated STEM instrument: a virtual perovskite specimen and a scan engine."""
