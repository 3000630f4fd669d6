"""Synthesis from path models: cross traffic and a bottleneck queue so far; the sampler is still to come."""
