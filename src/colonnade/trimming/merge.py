"""Fold the adapters feeding one layer into one joint low-rank adapter, by least squares.

The adapters from columns j_1..j_n into one layer add up to y = sum_i a_i(h_i). A joint
adapter reads the concatenation h = [h_1; ...; h_n] and applies U V (``JointAdapter``).
We collect h and y on task data, unfold convolution inputs into patches so that the map
is a plain matrix W (patch features x output channels), and solve

    W_ls = argmin ||X W - Y||_F      (minimum-norm least squares, LAPACK gelsd)

(solved on the R factor of a QR decomposition of [X Y] built up in chunks, so memory does
not grow with the number of samples or positions),

then keep the best rank-r approximation *on the data*: with the SVD  X W_ls = A S B^T,
W_r = W_ls B_r B_r^T is the reduced-rank regression solution (Izenman 1975, J.
Multivariate Anal. 5:248-264). Because the least-squares residual is orthogonal to the
column space of X, the relative error on the data is, exactly,

    err(r) = sqrt(||X W_ls - Y||^2 + sum_{i>r} s_i^2) / ||Y||.

For linear adapters y is linear in h, so at full rank the fit is exact (up to float
rounding); for nonlinear adapters W is the best joint low-rank *linear* map to their
summed outputs, and err says how far it is.

An adapter reading an adopted column's tap (model.bridges) joins the merge with its own
shape bridge: its rows are the bridged tap at each output position, set beside the other
columns' kernel windows, and the joint adapter keeps the bridge (``JointAdapter``'s tap
part, T). The tap adapter's map is linear in the bridged tap, so the same exactness holds.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch
import torch.nn.functional as F

from ..model.adapters import JointAdapter, build_joint
from ..model.network import AdapterInfo, ProgressiveNet
from ..model.schema import Conv1d, Conv2d
from ..training.fit import EVAL_BATCH

__all__ = ["JointFit", "fit_joint", "install_joint", "uninstall_joint", "joint_key"]


@dataclass
class JointFit:
    """A least-squares fit of one layer's adapters, from which any rank can be taken."""

    keys: list[str]  # the adapters it replaces, in source order
    sources: list[int]
    column: int | None
    block: int | None
    head: str | None
    W: torch.Tensor  # (P, O) float64: patch features x output channels
    B: torch.Tensor  # (O, R) right singular vectors of X W, by decreasing singular value
    s: torch.Tensor  # (R,) singular values of X W
    residual: float  # ||X W - Y||_F^2 of the full least-squares fit
    y_norm: float  # ||Y||_F
    rows: int  # rows of X (samples x output positions)
    params_replaced: int
    tap: int | None = None  # the tap of column 0 that one of the adapters read, if any
    tap_name: str | None = None
    tap_features: int = 0  # trailing rows of W: the bridged tap's features (T's inputs)

    @property
    def full_rank(self) -> int:
        return int(self.B.shape[1])

    def error(self, rank: int) -> float:
        """Relative Frobenius error of the rank-``rank`` fit on the data it was fitted on."""
        tail = float((self.s[rank:] ** 2).sum())
        return math.sqrt(max(self.residual + tail, 0.0)) / max(self.y_norm, 1e-300)

    def params(self, rank: int) -> int:
        return rank * (self.W.shape[0] + self.W.shape[1])

    def module(self, net: ProgressiveNet, rank: int) -> JointAdapter:
        """The joint adapter at ``rank``, weights set, on the net's device and dtype."""
        if not 1 <= rank <= self.full_rank:
            raise ValueError(f"rank must be in 1..{self.full_rank}, got {rank}")
        module = build_joint(net, tuple(self.sources), self.column, self.block, self.head,
                             rank, self.tap)
        Br = self.B[:, :rank]  # (O, r)
        V = (self.W @ Br).T  # (r, P): the columns' windows, then the bridged tap
        split = V.shape[1] - self.tap_features
        ref = next(net.parameters())
        with torch.no_grad():
            module.V.weight.copy_(V[:, :split].reshape(module.V.weight.shape))
            if self.tap is not None:
                module.T.weight.copy_(V[:, split:].reshape(module.T.weight.shape))
            module.U.weight.copy_(Br.reshape(module.U.weight.shape))
        return module.to(device=ref.device, dtype=ref.dtype)


def joint_key(fit: JointFit, taken: set[str] | dict) -> str:
    """A readable, unused key: ``c3_b1_joint_c0_c1`` or ``h_TASK_joint_c0_c1``."""
    tail = "_".join(f"c{s}" for s in fit.sources)
    base = (f"h_{fit.head}_joint_{tail}" if fit.head is not None
            else f"c{fit.column}_b{fit.block}_joint_{tail}")
    key, n = base, 1
    while key in taken:
        n += 1
        key = f"{base}_v{n}"
    return key


def _patches(h: torch.Tensor, target) -> torch.Tensor:  # noqa: ANN001 (a layer spec)
    """Rows of the map's input: features (dense) or unfolded kernel windows (conv)."""
    if isinstance(target, Conv1d):
        cols = F.unfold(h.unsqueeze(2), (1, target.kernel), padding=(0, target.padding),
                        stride=(1, target.stride))  # (N, C*k, L_out)
        return cols.transpose(1, 2).reshape(-1, cols.shape[1])
    if isinstance(target, Conv2d):
        cols = F.unfold(h, target.kernel, padding=target.padding, stride=target.stride)
        return cols.transpose(1, 2).reshape(-1, cols.shape[1])  # (N*L, C*k*k)
    return h.reshape(h.shape[0], -1)


def _rows(y: torch.Tensor) -> torch.Tensor:
    """Output rows: (N, O) for dense, (N * positions, O) for conv."""
    return y.movedim(1, -1).reshape(-1, y.shape[1]) if y.dim() > 2 else y


@torch.no_grad()
def fit_joint(net: ProgressiveNet, task: str, keys: list[str], x: torch.Tensor) -> JointFit:
    """Fit one joint map to the summed output of ``keys`` (all into one layer) on ``x``."""
    infos = [net.adapter_info[k] for k in keys]
    targets = {(a.column, a.block, a.head) for a in infos}
    if len(targets) != 1 or len(keys) < 2:
        raise ValueError("a merge needs at least two adapters into the same layer")
    for a in infos:
        if len(a.sources) != 1:
            raise ValueError(f"adapter {a.key} is joint already")
    order = sorted(range(len(keys)), key=lambda i: infos[i].source)
    keys = [keys[i] for i in order]
    sources = [infos[i].source for i in order]
    column, block, head = targets.pop()
    taps = [k for k in keys if "tap" in net.adapter_info[k].extra]
    if len(taps) > 1 or len(taps) == len(keys):
        raise ValueError("a merge takes at most one adapter reading a tap, beside others")
    tap = int(net.adapter_info[taps[0]].extra["tap"]) if taps else None
    columns = [k for k in keys if k not in taps]  # source order; the tap (column 0) apart
    _, _, target = net.lateral_geometry(tuple(s for s in sources if not taps or s != 0),
                                        column, block, head)

    inputs: dict[str, torch.Tensor] = {}
    outputs: dict[str, torch.Tensor] = {}

    def grab(key):
        def pre(module, args):
            inputs[key] = args[0].detach()

        def post(module, args, out):
            outputs[key] = out.detach()
        return pre, post

    handles = []
    for key in keys:
        pre, post = grab(key)
        handles.append(net.adapters[key].register_forward_pre_hook(pre))
        handles.append(net.adapters[key].register_forward_hook(post))
    acc = _Triangular()
    tap_features = 0
    was_training = net.training
    net.eval()
    try:
        for i in range(0, x.shape[0], EVAL_BATCH):
            net(x[i:i + EVAL_BATCH].to(net.device), task=task)
            h = torch.cat([inputs[k] for k in columns], dim=1).double().cpu()
            X = _patches(h, target)
            if taps:  # the tap through its adapter's own bridge, one row per position
                bridge = net.adapters[taps[0]].bridge
                t = inputs[taps[0]] if bridge is None else bridge(inputs[taps[0]])
                rows = _rows(t.double().cpu())
                tap_features = rows.shape[1]
                X = torch.cat([X, rows], dim=1)
            acc.add(X, _rows(sum(outputs[k].double() for k in keys).cpu()))
    finally:
        for handle in handles:
            handle.remove()
        net.train(was_training)
    Rxx, Rxy, Ryy = acc.blocks()
    W = torch.linalg.lstsq(Rxx, Rxy, driver="gelsd").solution  # (P, O), minimum norm
    residual = float(((Rxx @ W - Rxy) ** 2).sum() + (Ryy ** 2).sum())
    _, s, Bt = torch.linalg.svd(Rxx @ W, full_matrices=False)  # same s, B as X W
    rank = min(Rxx.shape[0], Rxy.shape[1], acc.rows)
    params = sum(p.numel() for k in keys for p in net.adapters[k].parameters())
    tap_name = net.adapter_info[taps[0]].extra.get("tap_name") if taps else None
    return JointFit(keys, sources, column, block, head, W, Bt[:rank].T.contiguous(), s[:rank],
                    residual, math.sqrt(acc.y_sq), acc.rows, params, tap, tap_name,
                    tap_features)


class _Triangular:
    """The R factor of the QR decomposition of [X Y], accumulated a chunk of rows at a time.

    With [X Y] = Q [[Rxx, Rxy], [0, Ryy]], least squares on X, Y reduces to Rxx, Rxy and
    the residual of the full fit is ||Rxx W - Rxy||^2 + ||Ryy||^2, in memory of the size
    of [X Y]'s columns squared, however many rows (samples x positions) there are.
    """

    CHUNK = 8192

    def __init__(self) -> None:
        self.R: torch.Tensor | None = None
        self.p = 0
        self.rows = 0
        self.y_sq = 0.0

    def add(self, X: torch.Tensor, Y: torch.Tensor) -> None:
        self.p = X.shape[1]
        self.rows += X.shape[0]
        self.y_sq += float((Y ** 2).sum())
        for i in range(0, X.shape[0], self.CHUNK):
            block = torch.cat([X[i:i + self.CHUNK], Y[i:i + self.CHUNK]], dim=1)
            stacked = block if self.R is None else torch.cat([self.R, block])
            self.R = torch.linalg.qr(stacked, mode="r").R

    def blocks(self) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        R, p = self.R, self.p
        k = R.shape[1]
        if R.shape[0] < k:  # fewer rows than columns so far: zero rows change nothing
            R = torch.cat([R, R.new_zeros(k - R.shape[0], k)])
        return R[:p, :p], R[:p, p:], R[p:, p:]


def install_joint(net: ProgressiveNet, fit: JointFit, rank: int,
                  extra: dict | None = None) -> tuple[str, dict]:
    """Replace the fitted adapters by their joint adapter at ``rank``; returns the key and
    what ``uninstall_joint`` needs to undo it."""
    module = fit.module(net, rank)
    key = joint_key(fit, net.adapter_info)
    undo = {"key": key, "modules": {k: net.adapters[k] for k in fit.keys},
            "order": list(net.adapters.keys())}
    net.retire_adapters(list(fit.keys), "merged", "merge")
    for k in fit.keys:
        net.adapter_info[k].extra["merged_into"] = key
    info = AdapterInfo(key, "joint", fit.sources[0], column=fit.column, block=fit.block,
                       head=fit.head, extra={"sources": list(fit.sources), "rank": int(rank),
                                             "merged_from": list(fit.keys), **(extra or {})})
    if fit.tap is not None:  # column 0 is read at this tap (model.adoption.adapter_reads)
        info.extra.update(tap=fit.tap, tap_name=fit.tap_name)
    net.adapters[key] = module
    net.adapter_info[key] = info
    net._reindex()
    net.freeze()
    return key, undo


def uninstall_joint(net: ProgressiveNet, undo: dict) -> None:
    """Put the original adapters back, in their original order, and drop the joint one."""
    key = undo["key"]
    if key in net.adapters:
        del net.adapters[key]
    net.adapter_info.pop(key, None)
    net.reinstate_adapters(undo["modules"], undo["order"])
    for k in undo["modules"]:
        net.adapter_info[k].extra.pop("merged_into", None)
