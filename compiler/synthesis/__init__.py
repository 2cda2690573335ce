"""Structure-aware compilation of the commuting diagonal block.

Every Z-term of a model commutes with every other, so a layer's middle block is one
diagonal operator (a phase polynomial). This package places the variables on the coupling
graph (:mod:`.placement`) and synthesises that operator directly as CNOTs on coupling edges
and RZs, either by one greedy parity network over the whole region (:mod:`.parity`,
:mod:`.linear`) or clique by clique after gathering each clique's variables with SWAPs
(:mod:`.sweep`), ending in a permutation of the wires that the rest of the circuit follows
(:mod:`.structured`). On gate sets with a native ZZ interaction a parity on two neighbouring
wires is one ZZ gate.

Examples:
    >>> import networkx as nx
    >>> from toposcout.compiler.synthesis import make_region, synthesize_block
    >>> region = make_region(nx.path_graph(3), [0, 1, 2])
    >>> b = synthesize_block([((0, 1), 0.3), ((1, 2), 0.2), ((0, 1, 2), 0.1)], region, [0, 1, 2])
    >>> b.cnots <= 4, sorted(b.final_placement)
    (True, [0, 1, 2])
"""

from toposcout.compiler.synthesis.block import Block, Region, append_gates, block_circuit, make_region, sweep_block, synthesize_block
from toposcout.compiler.synthesis.linear import peel_to_permutation
from toposcout.compiler.synthesis.parity import ParityNetwork, synthesize_parities
from toposcout.compiler.synthesis.placement import candidate_placements, exact_embedding, interaction_graph
from toposcout.compiler.synthesis.structured import compile_structured, structured_layers

__all__ = [
    "Block",
    "ParityNetwork",
    "Region",
    "append_gates",
    "block_circuit",
    "candidate_placements",
    "compile_structured",
    "exact_embedding",
    "interaction_graph",
    "make_region",
    "peel_to_permutation",
    "structured_layers",
    "sweep_block",
    "synthesize_block",
    "synthesize_parities",
]
