"""Time of one all-reduce under the alpha-beta(-gamma) cost model.

Why: the communication half of a step forecast. A message of n bytes between two
ranks costs α + n·β (α: latency in seconds, β: seconds per byte on the wire);
reducing n bytes locally costs n·γ. Each algorithm below is a sum of such terms.

    ring                2(p−1)·α + 2(p−1)/p·n·β + (p−1)/p·n·γ
                        Patarasuk & Yuan 2009, "Bandwidth optimal all-reduce
                        algorithms for clusters of workstations": a reduce-scatter
                        then an all-gather, p−1 rounds each, n/p bytes per round.
    recursive_doubling  ⌈lg p⌉·(α + n·β + n·γ)
                        Thakur, Rabenseifner, Gropp 2005, "Optimization of
                        Collective Communication Operations in MPICH".
    rabenseifner        2·⌈lg p⌉·α + 2(p−1)/p·n·β + (p−1)/p·n·γ
                        Thakur et al. 2005: recursive-halving reduce-scatter, then
                        recursive-doubling all-gather.
    two_level           g ranks per node, m = p/g nodes:
                        ring(n, g, intra) + ring(n/g, m, inter)
                        The intra-node ring all-reduce is split as its
                        reduce-scatter (each local rank ends up owning n/g reduced
                        bytes) and its all-gather; between them, the g local ranks
                        run g inter-node rings in parallel, each on its n/g shard
                        over the m nodes. Levels run one after another (no overlap),
                        so the two ring costs add. `inter` is therefore the link one
                        device sees across nodes.

For p not a power of two, ⌈lg p⌉ rounds stand in for the extra fold-in and
fold-out steps of Thakur et al. 2005: a simplification, slightly optimistic there.
p = 1 costs nothing: there is no peer to exchange with.
"""

import math

ALGORITHMS = ("ring", "recursive_doubling", "rabenseifner", "two_level")


def _ring(n: float, p: int, alpha: float, beta: float, gamma: float) -> float:
    if p == 1:
        return 0.0
    share = (p - 1) / p
    return 2 * (p - 1) * alpha + 2 * share * n * beta + share * n * gamma


def _rounds(p: int) -> int:
    return math.ceil(math.log2(p))


def allreduce_seconds(
    nbytes: float,
    ranks: int,
    alpha_s: float = 0.0,
    beta_s_per_byte: float = 0.0,
    gamma_s_per_byte: float = 0.0,
    algorithm: str = "ring",
    ranks_per_node: int | None = None,
    intra: tuple[float, float] | None = None,
    inter: tuple[float, float] | None = None,
) -> float:
    """Seconds for an all-reduce of `nbytes` over `ranks` (formulas in the module doc).

    Flat algorithms use (alpha_s, beta_s_per_byte). `two_level` needs
    `ranks_per_node` and the (alpha, beta) of each link: `intra` inside a node,
    `inter` across nodes; γ applies at both levels.
    """
    if ranks < 1 or int(ranks) != ranks:
        raise ValueError(f"ranks must be a positive whole number, got {ranks!r}")
    if nbytes < 0:
        raise ValueError(f"nbytes must be >= 0, got {nbytes!r}")
    p, n, g = int(ranks), float(nbytes), gamma_s_per_byte
    if p == 1:
        return 0.0
    if algorithm == "ring":
        return _ring(n, p, alpha_s, beta_s_per_byte, g)
    if algorithm == "recursive_doubling":
        return _rounds(p) * (alpha_s + n * beta_s_per_byte + n * g)
    if algorithm == "rabenseifner":
        share = (p - 1) / p
        return 2 * _rounds(p) * alpha_s + 2 * share * n * beta_s_per_byte + share * n * g
    if algorithm == "two_level":
        if ranks_per_node is None or intra is None or inter is None:
            raise ValueError("two_level needs ranks_per_node, intra=(alpha, beta) and inter=(alpha, beta)")
        per_node = int(ranks_per_node)
        if per_node < 1 or p % per_node:
            raise ValueError(f"ranks={p} is not a multiple of ranks_per_node={ranks_per_node}")
        nodes = p // per_node
        return _ring(n, per_node, *intra, g) + _ring(n / per_node, nodes, *inter, g)
    raise ValueError(f"unknown all-reduce algorithm {algorithm!r}; one of {', '.join(ALGORITHMS)}")
