"""The real-time iteration's QP, solved over its stage structure.

`StageQp` calls HPIPM (Frison & Diehl, "HPIPM: a high-performance quadratic programming
framework for model predictive control", IFAC-PapersOnLine 53(2), 2020) directly, through
the library casadi's wheel already ships (libhpipm with its BLASFEO; no compiler needed).
casadi's `conic(..., "hpipm")` solves the same QP, but on every call it allocates and
builds HPIPM's dimension, problem, solution and workspace structures again and gives every
state a box of +-1e8 where the problem has none (the tracking MPC's states carry the
artificial steady state too: 6-8 boxes per stage, about as many inequalities as the real
ones, each with its slack and multiplier pair in every interior-point iteration). Here the
structures are built once per problem and pattern of bounded variables, only the bounds
that exist become boxes, and a call is a handful of numpy scatters and a few calls into the
library. Measured on the rover's QPs of mpc_benchmark's loop (166 variables, 231 rows,
2-core machine): casadi's interface 317 us, this one without condensing 269 us, of which
the interior-point solve is 248 us and the scatters and copies about 20 us.

Partial condensing (HPIPM's part_cond; Axehill, "Controlling the level of sparsity in MPC",
Systems & Control Letters 76, 2015, citation from memory): the states inside each block of
STAGES_PER_BLOCK stages are eliminated, so the interior-point method works on fewer, larger
stages. For these small stages (6-9 states with the steady state, 2-3 inputs) each of
HPIPM's stage operations costs more in its fixed per-call work than in arithmetic, so fewer
stages are faster, until the condensed rows (every path row of a block depends on all its
inputs) cost more than they save. Median QP time over the QPs of mpc_benchmark's loops,
1 / 2 / 3 / 4 stages per block, HPIPM's absolute mode: car 522 / 321 / 441 / 271 us, rover
211 / 180 / 179 / 172, multirotor (21 rows a stage) 387 / 364 / 402 / 428, vessel 748 / 528
/ 599 / 607; two is the one choice near the best for all four.

HPIPM's problem (the paper's eq. 1), per stage k:
    min sum_k 0.5 [u;x]' [R S; S' Q] [u;x] + [r;q]' [u;x]
    x_{k+1} = A_k x_k + B_k u_k + b_k,  lg <= C x + D u <= ug,  box bounds on some x, u.
The caller's QP is casadi's conic form over w = [z_0 u_0 ... z_{N-1} u_{N-1} z_N]:
    min 0.5 dw' H dw + g' dw,  lba <= A dw <= uba,  lbx <= dw <= ubx,
with the rows of each stage laid out as `StageLayout` says (the dynamics rows first, read as
A z_k + B u_k - z_{k+1}). The nonzeros of H and A are scattered into the stage blocks by
index arrays computed once from their sparsity; a nonzero outside the stage structure is
refused when the solver is built, not silently dropped.

`ConicQp` is casadi's own conic interface for the other QP solvers (OSQP), with the same
call.
"""

from __future__ import annotations

import ctypes
import functools
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import casadi as ca
import numpy as np

from coverage_fleet.control.buffered_call import BufferedFunction

#: HPIPM's `hpipm_mode` enum (hpipm_common.h).
HPIPM_MODES = {"speed_abs": 0, "speed": 1, "balance": 2, "robust": 3}
#: HPIPM's status for a solution within the tolerances (hpipm_common.h: SUCCESS).
HPIPM_SUCCESS = 0
#: The missing side of a one-sided row or box (casadi's HPIPM interface uses the same,
#: its `inf` option): HPIPM wants finite bounds.
INFINITE_BOUND = 1e8
#: Stages per block of the partially condensed QP (module docstring: why two).
STAGES_PER_BLOCK = 2


@dataclass(frozen=True)
class StageLayout:
    """Where each stage's rows sit: decision variables [z_0 u_0 ... z_{N-1} u_{N-1} z_N]
    with len(z_k) = nz, len(u_k) = nu[k]; constraint rows per stage k: first the nz
    dynamics rows z_{k+1} - F(z_k, u_k) (k < N), then `path_rows[k]` other rows."""

    horizon: int
    nz: int
    nu: tuple[int, ...]
    path_rows: tuple[int, ...]

    def dynamics_mask(self) -> np.ndarray:
        rows = []
        for k in range(self.horizon + 1):
            if k < self.horizon:
                rows.append(np.ones(self.nz, dtype=bool))
            rows.append(np.zeros(self.path_rows[k], dtype=bool))
        return np.concatenate(rows)


@dataclass(frozen=True)
class QpSolution:
    """A QP's answer in the caller's variables: the step dw, the multipliers of the rows
    (casadi's sign convention: positive where an upper bound binds, the dynamics rows' in
    the same sign casadi's conic gives them) and of the bounds."""

    step: np.ndarray
    lam_a: np.ndarray
    lam_x: np.ndarray
    success: bool


@functools.cache
def _hpipm() -> ctypes.CDLL:
    """libhpipm from casadi's wheel (it finds its libblasfeo beside it: runpath $ORIGIN),
    with the return types of the size queries set."""
    folder = Path(ca.__file__).parent
    candidates = [folder / name for name in ("libhpipm.so", "libhpipm.dylib", "hpipm.dll")]
    found = [path for path in candidates if path.exists()]
    if not found:
        raise RuntimeError(
            f"casadi's HPIPM library is not in {folder}: the real-time path needs casadi "
            "from the package index, whose wheels ship it (or set mpc.solver.qp: osqp)"
        )
    library = ctypes.CDLL(str(found[0]))
    for structure in ("dim", "", "sol", "ipm_arg", "ipm_ws"):
        name = "d_ocp_qp" + (f"_{structure}" if structure else "")
        getattr(library, f"{name}_strsize").restype = ctypes.c_size_t
        getattr(library, f"{name}_memsize").restype = ctypes.c_size_t
    library.d_part_cond_qp_arg_memsize.restype = ctypes.c_size_t
    library.d_part_cond_qp_ws_memsize.restype = ctypes.c_size_t
    return library


class _Flat:
    """Per-stage blocks laid end to end in one float64 buffer (column-major, as HPIPM
    reads and writes them); an empty block still gets one slot, so every pointer is valid."""

    def __init__(self) -> None:
        self.starts: dict[str, np.ndarray] = {}
        self.size = 0

    def add(self, field: str, sizes: list[int]) -> None:
        starts = []
        for size in sizes:
            starts.append(self.size)
            self.size += max(int(size), 1)
        self.starts[field] = np.array(starts, dtype=int)

    def pointers(self, buffer: np.ndarray, field: str, count: int) -> ctypes.Array:
        base, size = buffer.ctypes.data, buffer.itemsize
        return (ctypes.c_void_p * count)(
            *(base + size * int(s) for s in self.starts[field][:count])
        )


class StageQp:
    """HPIPM on QPs with the stage structure of `layout` and fixed sparsities of H and A.

    mode: HPIPM's mode ("speed", ...); tolerance: of its stationarity, equality,
    inequality and complementarity residuals; iteration_limit: interior-point iterations;
    stages_per_block: of the partial condensing (1: none)."""

    def __init__(
        self,
        layout: StageLayout,
        hessian: ca.Sparsity,
        jacobian: ca.Sparsity,
        *,
        mode: str = "speed",
        tolerance: float = 1e-6,
        iteration_limit: int = 100,
        stages_per_block: int = STAGES_PER_BLOCK,
    ) -> None:
        if mode not in HPIPM_MODES:
            raise ValueError(f"HPIPM mode must be one of {list(HPIPM_MODES)}, got {mode!r}")
        self.layout = layout
        self.settings = (HPIPM_MODES[mode], tolerance, iteration_limit, stages_per_block)
        N, nz = layout.horizon, layout.nz
        self.nu = [*layout.nu, 0]
        self.ng = list(layout.path_rows)
        sizes = [nz + self.nu[k] for k in range(N + 1)]
        self.variable_start = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(int)
        self.n_w = int(sum(sizes))
        rows = [(nz if k < N else 0) + self.ng[k] for k in range(N + 1)]
        self.row_start = np.concatenate([[0], np.cumsum(rows)[:-1]]).astype(int)
        self.n_rows = int(sum(rows))
        if hessian.size() != (self.n_w, self.n_w) or jacobian.size() != (self.n_rows, self.n_w):
            raise ValueError(
                f"the stage layout gives {self.n_w} variables and {self.n_rows} rows; H is "
                f"{hessian.size()}, A is {jacobian.size()}"
            )
        self.hessian = tuple(np.array(v, dtype=int) for v in hessian.get_triplet())
        self.jacobian = tuple(np.array(v, dtype=int) for v in jacobian.get_triplet())
        self._check_structure()
        self._problems: dict[bytes, _HpipmProblem] = {}

    def _check_structure(self) -> None:
        """Refuse nonzeros HPIPM has no place for (they would be dropped silently)."""
        rows, cols = self.hessian
        if np.any(self.variables(rows)[0] != self.variables(cols)[0]):
            raise ValueError("the QP Hessian couples variables of different stages")
        rows, cols = self.jacobian
        row_stage, dynamics, row_local = self.rows(rows)
        col_stage, col_input, col_local = self.variables(cols)
        next_state = dynamics & (col_stage == row_stage + 1) & ~col_input
        if np.any(~((col_stage == row_stage) | next_state)):
            raise ValueError("a QP row reaches beyond its own stage and the next state")
        if np.any(next_state & (row_local != col_local)):
            raise ValueError("a dynamics row depends on another component of the next state")

    def variables(self, index: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Stage, whether an input, and position within z_k or u_k of variable indices."""
        stage = np.searchsorted(self.variable_start, index, side="right") - 1
        local = index - self.variable_start[stage]
        is_input = local >= self.layout.nz
        return stage, is_input, np.where(is_input, local - self.layout.nz, local)

    def rows(self, index: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Stage, whether a dynamics row, and position among the stage's dynamics rows or
        its path rows of row indices."""
        stage = np.searchsorted(self.row_start, index, side="right") - 1
        local = index - self.row_start[stage]
        has_dynamics = stage < self.layout.horizon
        dynamics = has_dynamics & (local < self.layout.nz)
        return stage, dynamics, np.where(has_dynamics & ~dynamics, local - self.layout.nz, local)

    def solve(
        self,
        h: np.ndarray,
        grad: np.ndarray,
        a: np.ndarray,
        lba: np.ndarray,
        uba: np.ndarray,
        lbx: np.ndarray,
        ubx: np.ndarray,
        lam_a0: np.ndarray | None = None,
        lam_x0: np.ndarray | None = None,
    ) -> QpSolution:
        """The QP's minimiser. h, a: the nonzeros of H and A in casadi's (column-major)
        order of the sparsities given at construction; the rest dense vectors. The
        interior-point method starts on its own (a warm start did not save iterations):
        lam_a0, lam_x0 are accepted for a common call with ConicQp and not used."""
        bounded = np.isfinite(lbx) | np.isfinite(ubx)
        key = bounded.tobytes()
        problem = self._problems.get(key)
        if problem is None:
            problem = self._problems[key] = _HpipmProblem(self, bounded)
        return problem.solve(h, grad, a, lba, uba, lbx, ubx)


class _HpipmProblem:
    """HPIPM's structures for one pattern of bounded variables, and the index arrays that
    fill them from the caller's arrays and read the answer back."""

    def __init__(self, qp: StageQp, bounded: np.ndarray) -> None:
        library = _hpipm()
        self._library = library
        self._keep: list[Any] = []
        N, nz, nu, ng = qp.layout.horizon, qp.layout.nz, qp.nu, qp.ng
        stage, is_input, local = qp.variables(np.arange(qp.n_w))
        box_x, box_u = bounded & ~is_input, bounded & is_input
        nbx = np.bincount(stage[box_x], minlength=N + 1).tolist()
        nbu = np.bincount(stage[box_u], minlength=N + 1).tolist()
        nb = [nbx[k] + nbu[k] for k in range(N + 1)]
        ng_array = np.array(ng)
        nu_array = np.array(nu)

        data = _Flat()
        for field, sizes in (
            ("A", [nz * nz] * N), ("B", [nz * nu[k] for k in range(N)]), ("b", [nz] * N),
            ("Q", [nz * nz] * (N + 1)), ("S", [nu[k] * nz for k in range(N + 1)]),
            ("R", [nu[k] * nu[k] for k in range(N + 1)]),
            ("q", [nz] * (N + 1)), ("r", nu),
            ("C", [ng[k] * nz for k in range(N + 1)]), ("D", [ng[k] * nu[k] for k in range(N + 1)]),
            ("lbx", nbx), ("ubx", nbx), ("lbu", nbu), ("ubu", nbu), ("lg", ng), ("ug", ng),
            ("none", [0] * (N + 1)),
        ):
            data.add(field, sizes)
        self._data = np.zeros(data.size)
        at = data.starts
        # Slices of the buffer filled in one piece: b (negated), the bounds (clipped).
        self._b_slice = slice(int(at["b"][0]), int(at["Q"][0]))
        self._bounds_slice = slice(int(at["lbx"][0]), int(at["none"][0]))

        # H: Q (both triangles), R (both), S (input row, state column); the state-row,
        # input-column nonzeros are S's transpose, which HPIPM does not read.
        rows, cols = qp.hessian
        row_stage, row_input, row_local = qp.variables(rows)
        col_stage, col_input, col_local = qp.variables(cols)
        destination = np.full(len(rows), -1)
        for mask, field, height in (
            (~row_input & ~col_input, "Q", np.full(len(rows), nz)),
            (row_input & col_input, "R", nu_array[row_stage]),
            (row_input & ~col_input, "S", nu_array[row_stage]),
        ):
            destination[mask] = (
                at[field][row_stage[mask]] + row_local[mask] + height[mask] * col_local[mask]
            )
        h_from = np.nonzero(destination >= 0)[0]
        h_to = destination[h_from]

        # A: dynamics rows give A_k, B_k and -I on z_{k+1}; path rows give C_k, D_k.
        rows, cols = qp.jacobian
        row_stage, dynamics, row_local = qp.rows(rows)
        col_stage, col_input, col_local = qp.variables(cols)
        same_stage = col_stage == row_stage
        destination = np.full(len(rows), -1)
        for mask, field, height in (
            (dynamics & same_stage & ~col_input, "A", np.full(len(rows), nz)),
            (dynamics & same_stage & col_input, "B", np.full(len(rows), nz)),
            (~dynamics & ~col_input, "C", ng_array[row_stage]),
            (~dynamics & col_input, "D", ng_array[row_stage]),
        ):
            destination[mask] = (
                at[field][row_stage[mask]] + row_local[mask] + height[mask] * col_local[mask]
            )
        a_from = np.nonzero(destination >= 0)[0]
        a_to = destination[a_from]

        # Row bounds: a dynamics row A z + B u - z_next in [c, c] is z_next = A z + B u - c.
        row_stage, dynamics, row_local = qp.rows(np.arange(qp.n_rows))
        dynamics_rows = np.nonzero(dynamics)[0]
        b_to = at["b"][row_stage[dynamics]] + row_local[dynamics]
        path_rows = np.nonzero(~dynamics)[0]
        path_stage, path_local = row_stage[~dynamics], row_local[~dynamics]
        lg_to = at["lg"][path_stage] + path_local
        ug_to = at["ug"][path_stage] + path_local

        # Gradient and boxes (a stage's box lists its inputs, then its states).
        q_from = np.nonzero(~is_input)[0]
        q_to = at["q"][stage[~is_input]] + local[~is_input]
        r_from = np.nonzero(is_input)[0]
        r_to = at["r"][stage[is_input]] + local[is_input]
        bx_from, bu_from = np.nonzero(box_x)[0], np.nonzero(box_u)[0]
        rank_x = np.concatenate([np.arange(n) for n in nbx]).astype(int)
        rank_u = np.concatenate([np.arange(n) for n in nbu]).astype(int)
        lbx_to = at["lbx"][stage[box_x]] + rank_x
        ubx_to = at["ubx"][stage[box_x]] + rank_x
        lbu_to = at["lbu"][stage[box_u]] + rank_u
        ubu_to = at["ubu"][stage[box_u]] + rank_u
        idxbx = [local[box_x & (stage == k)].astype(np.int32) for k in range(N + 1)]
        idxbu = [local[box_u & (stage == k)].astype(np.int32) for k in range(N + 1)]

        def pointers(field: str, count: int = N + 1) -> ctypes.Array:
            return data.pointers(self._data, field, count)

        def int_pointers(arrays: list[np.ndarray]) -> ctypes.Array:
            arrays = [a if len(a) else np.zeros(1, dtype=np.int32) for a in arrays]
            self._keep.extend(arrays)
            return (ctypes.c_void_p * len(arrays))(*(a.ctypes.data for a in arrays))

        none = pointers("none")
        no_slacks = [np.full(nb[k] + ng[k] + 1, -1, dtype=np.int32) for k in range(N + 1)]
        self._set_all_arguments = (
            pointers("A", N), pointers("B", N), pointers("b", N),
            pointers("Q"), pointers("S"), pointers("R"), pointers("q"), pointers("r"),
            int_pointers(idxbx), pointers("lbx"), pointers("ubx"),
            int_pointers(idxbu), pointers("lbu"), pointers("ubu"),
            pointers("C"), pointers("D"), pointers("lg"), pointers("ug"),
            none, none, none, none,
            int_pointers([np.zeros(1, dtype=np.int32)] * (N + 1)), int_pointers(no_slacks),
            none, none,
        )

        # The answer (d_ocp_qp_sol_get_all): u, x per stage, pi per dynamics block,
        # lam_lb / lam_ub per box, lam_lg / lam_ug per path row.
        answer = _Flat()
        for field, sizes in (
            ("u", nu), ("x", [nz] * (N + 1)), ("pi", [nz] * N), ("lam_lb", nb),
            ("lam_ub", nb), ("lam_lg", ng), ("lam_ug", ng), ("none", [0] * (N + 1)),
        ):
            answer.add(field, sizes)
        self._answer = np.zeros(answer.size)
        out = answer.starts
        none = answer.pointers(self._answer, "none", N + 1)
        self._get_all_arguments = (
            *(answer.pointers(self._answer, f, N + 1) for f in ("u", "x")), none, none,
            answer.pointers(self._answer, "pi", N),
            *(
                answer.pointers(self._answer, f, N + 1)
                for f in ("lam_lb", "lam_ub", "lam_lg", "lam_ug")
            ),
            none, none,
        )
        self._step_from = np.where(is_input, out["u"][stage] + local, out["x"][stage] + local)
        pi_from = out["pi"][row_stage[dynamics]] + row_local[dynamics]
        lg_from = out["lam_lg"][path_stage] + path_local
        ug_from = out["lam_ug"][path_stage] + path_local
        boxed = np.concatenate([bu_from, bx_from])
        boxed = boxed[np.lexsort((~is_input[boxed], stage[boxed]))]
        boxed = boxed
        rank = np.concatenate([np.arange(n) for n in nb]).astype(int)
        box_lb_from = out["lam_lb"][stage[boxed]] + rank
        box_ub_from = out["lam_ub"][stage[boxed]] + rank
        # Where each value comes from in the concatenated sources of solve(), and goes.
        lengths = [len(qp.hessian[0]), len(qp.jacobian[0])] + [qp.n_rows] * 2 + [qp.n_w] * 3
        h_at, a_at, lba_at, uba_at, grad_at, lbx_at, ubx_at = np.cumsum([0, *lengths[:-1]])
        pairs = (
            (h_from + h_at, h_to), (a_from + a_at, a_to),
            (dynamics_rows + lba_at, b_to),
            (path_rows + lba_at, lg_to), (path_rows + uba_at, ug_to),
            (q_from + grad_at, q_to), (r_from + grad_at, r_to),
            (bx_from + lbx_at, lbx_to), (bx_from + ubx_at, ubx_to),
            (bu_from + lbx_at, lbu_to), (bu_from + ubx_at, ubu_to),
        )
        self._from = np.concatenate([source for source, _ in pairs])
        self._to = np.concatenate([target for _, target in pairs])
        # Multipliers as differences of two answer slots (an unused slot holds 0): rows
        # pi or lam_ug - lam_lg, variables lam_ub - lam_lb or 0.
        zero = int(out["none"][0])
        self._lam_a_plus = np.full(qp.n_rows, zero)
        self._lam_a_minus = np.full(qp.n_rows, zero)
        self._lam_a_plus[dynamics_rows] = pi_from
        self._lam_a_plus[path_rows] = ug_from
        self._lam_a_minus[path_rows] = lg_from
        self._lam_x_plus = np.full(qp.n_w, zero)
        self._lam_x_minus = np.full(qp.n_w, zero)
        self._lam_x_plus[boxed] = box_ub_from
        self._lam_x_minus[boxed] = box_lb_from
        self._build_solver(qp, [[nz] * (N + 1), nu, nbx, nbu, ng, [0] * (N + 1)])

    def _allocate(self, size: int) -> ctypes.Array:
        # HPIPM aligns inside the memory it is given; 64 bytes spare leave it room.
        memory = ctypes.create_string_buffer(int(size) + 64)
        self._keep.append(memory)
        return memory

    def _build_solver(self, qp: StageQp, dims: list[list[int]]) -> None:
        library, allocate = self._library, self._allocate
        mode, tolerance, iteration_limit, stages_per_block = qp.settings
        N = qp.layout.horizon
        dim = allocate(library.d_ocp_qp_dim_strsize())
        library.d_ocp_qp_dim_create(N, dim, allocate(library.d_ocp_qp_dim_memsize(N)))
        library.d_ocp_qp_dim_set_all(*((ctypes.c_int * (N + 1))(*d) for d in dims), dim)
        self._qp = allocate(library.d_ocp_qp_strsize())
        library.d_ocp_qp_create(dim, self._qp, allocate(library.d_ocp_qp_memsize(dim)))
        self._sol = allocate(library.d_ocp_qp_sol_strsize())
        library.d_ocp_qp_sol_create(dim, self._sol, allocate(library.d_ocp_qp_sol_memsize(dim)))
        blocks = max(1, math.ceil(N / stages_per_block))
        self._condensed = blocks < N
        solved_dim = dim
        if self._condensed:
            block_size = (ctypes.c_int * (N + 1))()
            library.d_part_cond_qp_compute_block_size(N, blocks, block_size)
            solved_dim = allocate(library.d_ocp_qp_dim_strsize())
            library.d_ocp_qp_dim_create(
                blocks, solved_dim, allocate(library.d_ocp_qp_dim_memsize(blocks))
            )
            library.d_part_cond_qp_compute_dim(dim, block_size, solved_dim)
            self._cond_arg = allocate(64)
            library.d_part_cond_qp_arg_create(
                blocks, self._cond_arg, allocate(library.d_part_cond_qp_arg_memsize(blocks))
            )
            library.d_part_cond_qp_arg_set_default(self._cond_arg)
            self._cond_ws = allocate(64)
            library.d_part_cond_qp_ws_create(
                dim, block_size, solved_dim, self._cond_arg, self._cond_ws,
                allocate(library.d_part_cond_qp_ws_memsize(
                    dim, block_size, solved_dim, self._cond_arg
                )),
            )
            self._keep.append(block_size)
            self._solved_qp = allocate(library.d_ocp_qp_strsize())
            library.d_ocp_qp_create(
                solved_dim, self._solved_qp, allocate(library.d_ocp_qp_memsize(solved_dim))
            )
            self._solved_sol = allocate(library.d_ocp_qp_sol_strsize())
            library.d_ocp_qp_sol_create(
                solved_dim, self._solved_sol, allocate(library.d_ocp_qp_sol_memsize(solved_dim))
            )
        else:
            self._solved_qp, self._solved_sol = self._qp, self._sol
        self._arg = allocate(library.d_ocp_qp_ipm_arg_strsize())
        library.d_ocp_qp_ipm_arg_create(
            solved_dim, self._arg, allocate(library.d_ocp_qp_ipm_arg_memsize(solved_dim))
        )
        library.d_ocp_qp_ipm_arg_set_default(mode, self._arg)
        # The dynamics rows' multipliers weight the next step's curvature term (rti.py);
        # HPIPM's speed_abs mode leaves them uncomputed by default (and then 72-79 % of the
        # rover's and car's samples failed the acceptance test instead of 98-99 %).
        library.d_ocp_qp_ipm_arg_set_comp_dual_sol_eq(ctypes.byref(ctypes.c_int(1)), self._arg)
        value = ctypes.c_double(tolerance)
        for residual in ("stat", "eq", "ineq", "comp"):
            getattr(library, f"d_ocp_qp_ipm_arg_set_tol_{residual}")(
                ctypes.byref(value), self._arg
            )
        library.d_ocp_qp_ipm_arg_set_iter_max(
            ctypes.byref(ctypes.c_int(iteration_limit)), self._arg
        )
        self._ws = allocate(library.d_ocp_qp_ipm_ws_strsize())
        library.d_ocp_qp_ipm_ws_create(
            solved_dim, self._arg, self._ws,
            allocate(library.d_ocp_qp_ipm_ws_memsize(solved_dim, self._arg)),
        )
        self._status = ctypes.c_int()

    def solve(
        self,
        h: np.ndarray,
        grad: np.ndarray,
        a: np.ndarray,
        lba: np.ndarray,
        uba: np.ndarray,
        lbx: np.ndarray,
        ubx: np.ndarray,
    ) -> QpSolution:
        data, library = self._data, self._library
        # One gather and one scatter (numpy calls, not elements, are what costs here).
        sources = np.concatenate((h, a, lba, uba, grad, lbx, ubx))
        data[self._to] = sources[self._from]
        data[self._b_slice] *= -1.0
        np.clip(data[self._bounds_slice], -INFINITE_BOUND, INFINITE_BOUND,
                out=data[self._bounds_slice])
        library.d_ocp_qp_set_all(*self._set_all_arguments, self._qp)
        if self._condensed:
            library.d_part_cond_qp_cond(self._qp, self._solved_qp, self._cond_arg, self._cond_ws)
        library.d_ocp_qp_ipm_solve(self._solved_qp, self._solved_sol, self._arg, self._ws)
        if self._condensed:
            library.d_part_cond_qp_expand_sol(
                self._qp, self._solved_sol, self._sol, self._cond_arg, self._cond_ws
            )
        library.d_ocp_qp_ipm_get_status(self._ws, ctypes.byref(self._status))
        library.d_ocp_qp_sol_get_all(self._sol, *self._get_all_arguments)
        answer = self._answer
        lam_a = answer[self._lam_a_plus] - answer[self._lam_a_minus]
        lam_x = answer[self._lam_x_plus] - answer[self._lam_x_minus]
        return QpSolution(
            step=answer[self._step_from],
            lam_a=lam_a,
            lam_x=lam_x,
            success=self._status.value == HPIPM_SUCCESS,
        )


class ConicQp:
    """A casadi conic plugin (OSQP) on the same call as StageQp."""

    def __init__(
        self, plugin: str, hessian: ca.Sparsity, jacobian: ca.Sparsity, options: dict[str, Any]
    ) -> None:
        solver = ca.conic("rti_qp", plugin, {"h": hessian, "a": jacobian}, options)
        n_w, n_rows = jacobian.size2(), jacobian.size1()
        h, a = ca.MX.sym("h", hessian.nnz()), ca.MX.sym("a", jacobian.nnz())
        vectors = {
            name: ca.MX.sym(name, size)
            for name, size in (
                ("grad", n_w), ("lba", n_rows), ("uba", n_rows), ("lbx", n_w), ("ubx", n_w),
                ("lam_a0", n_rows), ("lam_x0", n_w),
            )
        }
        answer = solver(
            h=ca.MX(hessian, h), a=ca.MX(jacobian, a), g=vectors["grad"],
            **{name: vectors[name] for name in ("lba", "uba", "lbx", "ubx", "lam_a0", "lam_x0")},
        )
        self._solve = BufferedFunction(
            ca.Function(
                "rti_qp_call",
                [h, a, *vectors.values()],
                [answer["x"], answer["lam_a"], answer["lam_x"]],
                ["h", "a", *vectors],
                ["x", "lam_a", "lam_x"],
            )
        )
        self._n_w, self._n_rows = n_w, n_rows

    def solve(
        self,
        h: np.ndarray,
        grad: np.ndarray,
        a: np.ndarray,
        lba: np.ndarray,
        uba: np.ndarray,
        lbx: np.ndarray,
        ubx: np.ndarray,
        lam_a0: np.ndarray | None = None,
        lam_x0: np.ndarray | None = None,
    ) -> QpSolution:
        result = self._solve(
            h=h, a=a, grad=grad, lba=lba, uba=uba, lbx=lbx, ubx=ubx,
            lam_a0=np.zeros(self._n_rows) if lam_a0 is None else lam_a0,
            lam_x0=np.zeros(self._n_w) if lam_x0 is None else lam_x0,
        )
        return QpSolution(
            step=result["x"].copy(),
            lam_a=result["lam_a"].copy(),
            lam_x=result["lam_x"].copy(),
            success=bool(self._solve.stats().get("success", False)),
        )
