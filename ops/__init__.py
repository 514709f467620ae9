"""Seawall's control plane: command line, config, metrics, schedules, registry, waves."""
