"""Simulated campaigns: test problems with known answers, the campaign loop, peer strategies, the runner."""
