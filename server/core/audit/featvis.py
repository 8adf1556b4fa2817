"""Feature visualisation: synthesise an input that makes one channel fire.

Olah, Mordvintsev & Schubert, "Feature Visualization", Distill 2017 (doi:10.23915/distill.00007):
optimise the input by gradient ascent on a unit's activation, with regularisers that keep the
picture from turning into high-frequency noise:

- transformation robustness: every step sees the picture randomly shifted (jitter) and rescaled;
- a Fourier parameterisation: the picture is the inverse FFT of a spectrum whose frequencies are
  scaled by 1/f, so the optimiser moves low frequencies as easily as high ones;
- a decorrelated colour space: the three optimised planes are mixed into RGB by the square root
  of the colour covariance, so colour and brightness are learned separately;
- optional blur: a small Gaussian blur of the picture every few steps (the "pixel"
  parameterisation uses it by default, the Fourier one does not need it).

The objective is the channel's mean activation over the layer's spatial positions. Everything
random comes from ``seed``, so the same call gives the same picture. A synthetic picture shows
what excites a channel, not what it responds to in real data: show it beside the gallery.
"""

from __future__ import annotations

import math
import random
import time
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from pellucid.core.errors import BadParameterError, UnsupportedLayerError
from pellucid.core.progress import CancelToken, ProgressFn, step
from pellucid.core.views.probe import Probe

__all__ = ["IMAGENET_COLOUR_SQRT", "PARAMETERISATIONS", "FeatureVisual", "colour_sqrt", "feature_visual"]

PARAMETERISATIONS = ("fourier", "pixel")
# Square root of ImageNet's RGB colour correlation as used in the Distill article's code
# (from memory); audits pass one computed from their own folder instead (see colour_sqrt).
IMAGENET_COLOUR_SQRT = np.array([[0.26, 0.09, 0.02], [0.27, 0.00, -0.05], [0.27, -0.09, 0.03]], dtype=np.float64)


@dataclass
class FeatureVisual:
    """A synthesised (H, W, 3) uint8 picture and how it was made."""

    layer: str
    channel: int
    image: np.ndarray
    objective: list[float]
    start_activation: float
    final_activation: float
    params: dict
    seconds: float

    def to_dict(self) -> dict:
        return {"layer": self.layer, "channel": self.channel, "objective": self.objective,
                "start_activation": self.start_activation, "final_activation": self.final_activation,
                "params": self.params, "seconds": self.seconds}


def colour_sqrt(pixels: np.ndarray) -> np.ndarray:
    """(N, 3) RGB samples in [0, 1] → 3×3 square root of their covariance (U·√S), for decorrelation."""
    pixels = np.asarray(pixels, dtype=np.float64).reshape(-1, 3)
    if pixels.shape[0] < 4:
        raise BadParameterError(f"need at least 4 colour samples to estimate a covariance; received {pixels.shape[0]}")
    cov = np.cov(pixels, rowvar=False)
    u, s, _ = np.linalg.svd(cov)
    return u @ np.diag(np.sqrt(np.maximum(s, 1e-12)))


def _spectrum_scale(h: int, w: int, decay: float) -> torch.Tensor:
    fy = np.fft.fftfreq(h)[:, None]
    fx = np.fft.rfftfreq(w)[None, :]
    freqs = np.sqrt(fx * fx + fy * fy)
    scale = 1.0 / np.maximum(freqs, 1.0 / max(h, w)) ** decay
    return torch.from_numpy((scale * math.sqrt(h * w)).astype(np.float32))


def _gaussian_kernel(sigma: float) -> torch.Tensor:
    radius = max(1, math.ceil(3 * sigma))
    t = torch.arange(-radius, radius + 1, dtype=torch.float32)
    k = torch.exp(-(t * t) / (2 * sigma * sigma))
    return k / k.sum()


def _blur(img: torch.Tensor, sigma: float) -> torch.Tensor:
    """(1, C, H, W) Gaussian blur with reflect padding."""
    k = _gaussian_kernel(sigma)
    c = img.shape[1]
    r = (k.numel() - 1) // 2
    x = F.pad(img, (r, r, 0, 0), mode="reflect")
    x = F.conv2d(x, k.view(1, 1, 1, -1).repeat(c, 1, 1, 1), groups=c)
    x = F.pad(x, (0, 0, r, r), mode="reflect")
    return F.conv2d(x, k.view(1, 1, -1, 1).repeat(c, 1, 1, 1), groups=c)


def _fit_size(x: torch.Tensor, h: int, w: int) -> torch.Tensor:
    """Centre-crop or pad (with 0.5 grey) to (h, w)."""
    _, _, xh, xw = x.shape
    if xh > h or xw > w:
        top, left = max(0, (xh - h) // 2), max(0, (xw - w) // 2)
        x = x[:, :, top:top + min(h, xh), left:left + min(w, xw)]
    _, _, xh, xw = x.shape
    if xh < h or xw < w:
        ph, pw = h - xh, w - xw
        x = F.pad(x, (pw // 2, pw - pw // 2, ph // 2, ph - ph // 2), value=0.5)
    return x


def feature_visual(
    model: nn.Module,
    *,
    layer: str,
    channel: int,
    size: tuple[int, int],
    channels: int = 3,
    mean: Sequence[float] = (0.0, 0.0, 0.0),
    std: Sequence[float] = (1.0, 1.0, 1.0),
    steps: int = 128,
    lr: float = 0.05,
    seed: int = 0,
    parameterisation: str = "fourier",
    decorrelate: bool = True,
    colour_matrix: np.ndarray | None = None,
    jitter: int = 4,
    scales: Sequence[float] = (0.92, 0.96, 1.0, 1.04, 1.08),
    blur_sigma: float | None = None,
    blur_every: int = 4,
    decay: float = 1.0,
    progress: ProgressFn | None = None,
    cancel: CancelToken | None = None,
) -> FeatureVisual:
    """Gradient ascent on the mean activation of ``channel`` at ``layer``.

    ``model`` maps (1, C, H, W) tensors normalised with ``mean``/``std`` to anything; ``size`` is
    (H, W). Returns the picture in [0, 255] RGB (grey repeated for one-channel models).
    """
    if parameterisation not in PARAMETERISATIONS:
        raise BadParameterError(f"parameterisation must be one of {', '.join(PARAMETERISATIONS)}; "
                                f"received {parameterisation!r}")
    for name, value, lo, hi in (("steps", steps, 1, 4096), ("jitter", jitter, 0, 64),
                                ("blur_every", blur_every, 1, 1024)):
        if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
            raise BadParameterError(f"{name} must be a whole number from {lo} to {hi}; received {value!r}")
    if not (isinstance(lr, (int, float)) and math.isfinite(lr) and 0 < lr <= 10):
        raise BadParameterError(f"lr must be a positive number up to 10; received {lr!r}")
    if not scales or any(not (isinstance(s, (int, float)) and 0.25 <= s <= 4) for s in scales):
        raise BadParameterError(f"scales must be numbers between 0.25 and 4; received {list(scales)!r}")
    if blur_sigma is not None and not (isinstance(blur_sigma, (int, float)) and 0 < blur_sigma <= 10):
        raise BadParameterError(f"blur_sigma must be a positive number up to 10; received {blur_sigma!r}")
    h, w = (int(v) for v in size)
    start = time.perf_counter()
    gen = torch.Generator().manual_seed(int(seed))
    rng = random.Random(int(seed))
    mean_t = torch.tensor(list(mean), dtype=torch.float32).view(1, -1, 1, 1)
    std_t = torch.tensor(list(std), dtype=torch.float32).view(1, -1, 1, 1)
    if mean_t.shape[1] != channels or std_t.shape[1] != channels:
        raise BadParameterError(f"mean and std need {channels} values; received {list(mean)} and {list(std)}")
    if blur_sigma is None and parameterisation == "pixel":
        blur_sigma = 0.5

    planes = 3 if channels == 3 else 1
    if parameterisation == "fourier":
        scale = _spectrum_scale(h, w, decay)
        param = (0.01 * torch.randn((planes, h, w // 2 + 1, 2), generator=gen)).requires_grad_(True)
    else:
        scale = None
        param = (0.01 * torch.randn((1, planes, h, w), generator=gen)).requires_grad_(True)
    mix: torch.Tensor | None = None
    if planes == 3 and decorrelate:
        m = np.asarray(colour_matrix if colour_matrix is not None else IMAGENET_COLOUR_SQRT, dtype=np.float64)
        if m.shape != (3, 3) or not np.isfinite(m).all():
            raise BadParameterError(f"colour_matrix must be a finite 3×3 matrix; received shape {m.shape}")
        m = m / max(np.linalg.norm(m, axis=0).max(), 1e-12)
        mix = torch.from_numpy(m.astype(np.float32))

    def picture() -> torch.Tensor:
        if scale is not None:
            spec = torch.view_as_complex(param) * scale
            raw = torch.fft.irfft2(spec, s=(h, w)).unsqueeze(0) / 4.0
        else:
            raw = param
        if mix is not None:
            raw = torch.einsum("ij,bjhw->bihw", mix, raw)
        return torch.sigmoid(raw)  # (1, planes, H, W) in [0, 1]

    def to_model(img01: torch.Tensor) -> torch.Tensor:
        x = img01 if channels == planes else img01.mean(dim=1, keepdim=True)
        return (x - mean_t) / std_t

    flags = [(m, m.training) for m in model.modules()]
    model.eval()
    objective: list[float] = []
    try:
        with torch.inference_mode(False), torch.enable_grad():
            def activation(x: torch.Tensor, probe: Probe) -> torch.Tensor:
                model(x)
                act = probe.outputs.get(layer)
                if act is None or act.ndim != 4:
                    got = tuple(act.shape) if act is not None else "nothing"
                    raise UnsupportedLayerError(
                        f"layer {layer!r} gave {got}; feature visualisation needs a (N, C, h, w) feature map")
                if not 0 <= channel < act.shape[1]:
                    raise BadParameterError(f"channel {channel} is out of range for layer {layer!r}, which has "
                                            f"{act.shape[1]} channels (0..{act.shape[1] - 1})")
                return act[0, channel].mean()

            with Probe(model, [layer], keep_graph=True) as probe:
                with torch.no_grad():
                    start_act = float(activation(to_model(picture()), probe))
                opt = torch.optim.Adam([param], lr=float(lr))
                for i in range(steps):
                    step(i, steps, progress=progress, cancel=cancel)
                    opt.zero_grad()
                    img = picture()
                    if blur_sigma and parameterisation == "fourier":
                        img = _blur(img, float(blur_sigma))
                    if jitter:
                        dy, dx = rng.randint(-jitter, jitter), rng.randint(-jitter, jitter)
                        img = torch.roll(img, shifts=(dy, dx), dims=(2, 3))
                    s = rng.choice(list(scales))
                    if s != 1.0:
                        img = F.interpolate(img, scale_factor=float(s), mode="bilinear", align_corners=False)
                        img = _fit_size(img, h, w)
                    value = activation(to_model(img), probe)
                    (-value).backward()
                    opt.step()
                    objective.append(float(value.detach()))
                    if blur_sigma and parameterisation == "pixel" and (i + 1) % blur_every == 0:
                        with torch.no_grad():
                            param.copy_(_blur(param, float(blur_sigma)))
                step(steps, steps, progress=progress, cancel=cancel)
                with torch.no_grad():
                    final = picture()
                    if blur_sigma and parameterisation == "fourier":
                        final = _blur(final, float(blur_sigma))
                    final_act = float(activation(to_model(final), probe))
    finally:
        for m, flag in flags:
            m.training = flag
    arr = final[0].detach().numpy().transpose(1, 2, 0)
    if arr.shape[2] == 1:
        arr = np.repeat(arr, 3, axis=2)
    image = np.clip(arr * 255.0 + 0.5, 0, 255).astype(np.uint8)
    params = {"steps": steps, "lr": float(lr), "seed": int(seed), "parameterisation": parameterisation,
              "decorrelate": bool(mix is not None), "jitter": jitter, "scales": [float(s) for s in scales],
              "blur_sigma": blur_sigma, "blur_every": blur_every, "decay": decay, "size": [h, w],
              "objective": "mean activation of the channel over its spatial positions"}
    if mix is not None:
        params["colour_matrix"] = mix.numpy().round(6).tolist()
    return FeatureVisual(layer=layer, channel=int(channel), image=image, objective=objective,
                         start_activation=start_act, final_activation=final_act, params=params,
                         seconds=time.perf_counter() - start)
