"""Roughness side of quietedge: edge traces in, unbiased LER/LWR statistics, PSDs and reports out."""
from .synth import edge_pairs, rough_edges, simulate_line_space, thorsos_edges

__all__ = ["rough_edges", "edge_pairs", "thorsos_edges", "simulate_line_space"]
