"""Structure-aware compilation of the commuting diagonal block.

Every Z-term of a model commutes with every other, so a layer's middle block is one
diagonal operator (a phase polynomial). This package places the variables on the coupling
graph (:mod:`.placement`) and synthesises that operator directly as CNOTs on coupling edges
and RZs (:mod:`.parity`, :mod:`.linear`), ending in a permutation of the wires that the rest
of the circuit follows (:mod:`.structured`).

Examples:
    >>> import networkx as nx
    >>> from compiler.synthesis import make_region, synthesize_block
    >>> region = make_region(nx.path_graph(3), [0, 1, 2])
    >>> b = synthesize_block([((0, 1), 0.3), ((1, 2), 0.2), ((0, 1, 2), 0.1)], region, [0, 1, 2])
    >>> b.cnots <= 4, sorted(b.final_placement)
    (True, [0, 1, 2])
"""

from compiler.synthesis.block import Block, Region, block_circuit, make_region, synthesize_block
from compiler.synthesis.linear import peel_to_permutation
from compiler.synthesis.parity import ParityNetwork, synthesize_parities
from compiler.synthesis.placement import candidate_placements, exact_embedding, interaction_graph
from compiler.synthesis.structured import compile_structured, structured_layers

__all__ = [
    "Block",
    "ParityNetwork",
    "Region",
    "block_circuit",
    "candidate_placements",
    "compile_structured",
    "exact_embedding",
    "interaction_graph",
    "make_region",
    "peel_to_permutation",
    "structured_layers",
    "synthesize_block",
    "synthesize_parities",
]
