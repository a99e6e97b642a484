"""Random changes to training batches, in batched tensor operations on the CPU.

Each batch is changed as a whole: one draw of every random number per image from the candidate's own
generator, then a few tensor operations over the batch (whole-pixel shift and flip as a map of source
pixels that the trainer folds into the copy cutting the batch, one resampling for rotation and zoom,
arithmetic for brightness and contrast). Edges are repeated into
whatever a move uncovers, as a camera would see more of the same background. The trainer calls this on
training batches only; validation and test images are never changed.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from searcher.core.train_settings import AugmentSettings


Remap = tuple[torch.Tensor, torch.Tensor]  # source row of each output row (N×H), source column of each column (N×W)


def shift_map(dy: torch.Tensor, dx: torch.Tensor, h: int, w: int) -> Remap:
    """Where each output row and column of image n comes from when it moves dy[n] down and dx[n] right
    (negative: up, left), edge rows and columns repeated into the gap."""
    return (torch.arange(h) - dy[:, None]).clamp_(0, h - 1), (torch.arange(w) - dx[:, None]).clamp_(0, w - 1)


def remap_images(images: torch.Tensor, remap: Remap) -> torch.Tensor:
    """Images N×C×H×W (any dtype) with rows and columns taken as `remap` says: two gathers."""
    rows, cols = remap
    n, c, h, w = images.shape
    out = images.gather(2, rows[:, None, :, None].expand(n, c, h, w))
    return out.gather(3, cols[:, None, None, :].expand(n, c, h, w))


def shift_edge(images: torch.Tensor, dy: torch.Tensor, dx: torch.Tensor) -> torch.Tensor:
    """Move image n down by dy[n] and right by dx[n] whole pixels (negative: up, left), repeating edge pixels."""
    return remap_images(images, shift_map(dy, dx, *images.shape[-2:]))


def warp(images: torch.Tensor, degrees: torch.Tensor, zoom: torch.Tensor, dy: torch.Tensor,
         dx: torch.Tensor) -> torch.Tensor:
    """Rotate image n by degrees[n] (counter-clockwise as displayed), zoom it by zoom[n] about its centre and
    move it by (dy[n], dx[n]) pixels, in one bilinear resampling of float N×C×H×W with edges repeated.

    torch's grid_sample, fed plain N×C×H×W (channels-last input ran slower); a version written out with
    index_select over pixel rows measured 3-4× slower than this on one CPU thread."""
    images = images.contiguous()
    n, _, h, w = images.shape
    angle = torch.deg2rad(degrees.float())
    cos, sin = torch.cos(angle) / zoom, torch.sin(angle) / zoom
    # Output pixel -> input pixel, in the normalised [-1, 1] coordinates grid_sample uses; the H/W factors
    # keep a rotation round on a non-square image.
    theta = torch.stack([
        torch.stack([cos, -sin * h / w, -2 * dx.float() / w], 1),
        torch.stack([sin * w / h, cos, -2 * dy.float() / h], 1),
    ], 1)  # N×2×3
    grid = F.affine_grid(theta, list(images.shape), align_corners=False)
    return F.grid_sample(images, grid, mode="bilinear", padding_mode="border", align_corners=False)


class Augmenter:
    """Applies `settings` to batches, drawing from its own generator so a seed repeats exactly."""

    def __init__(self, settings: AugmentSettings, seed: int) -> None:
        self.settings = settings
        self.generator = torch.Generator().manual_seed(seed)

    def _uniform(self, n: int, half_width: float) -> torch.Tensor:
        return (torch.rand(n, generator=self.generator) * 2 - 1) * half_width

    def remap(self, n: int, h: int, w: int) -> Remap | None:
        """The changes that need no interpolation, as a source row and column for each output row and column:
        whole-pixel shift (unless a warp follows, which takes the shift) and flip. None when neither is on.
        The trainer folds this into the copy that cuts the batch, so it costs no pass of its own."""
        s = self.settings
        if not (s.flip or (s.shift and not self._warps)):
            return None
        if s.shift and not self._warps:
            dy, dx = torch.randint(-s.shift, s.shift + 1, (2, n), generator=self.generator)
            rows, cols = shift_map(dy, dx, h, w)
        else:
            rows, cols = torch.arange(h).expand(n, h), torch.arange(w).expand(n, w)
        if s.flip:
            mirror = torch.rand(n, generator=self.generator) < 0.5
            cols = torch.where(mirror[:, None], cols.flip(1), cols)
        return rows, cols

    def before_float(self, batch: torch.Tensor) -> torch.Tensor:
        """`remap` applied to a batch N×C×H×W (of any dtype) on its own."""
        remap = self.remap(len(batch), *batch.shape[-2:])
        return batch if remap is None else remap_images(batch, remap)

    def after_float(self, batch: torch.Tensor) -> torch.Tensor:
        """Rotation, zoom (with any shift folded in) and brightness/contrast, on the float batch in [0, 1]."""
        s, n = self.settings, len(batch)
        if self._warps:
            degrees = self._uniform(n, s.rotate)
            zoom = 1 + self._uniform(n, s.scale)
            dy, dx = torch.randint(-s.shift, s.shift + 1, (2, n), generator=self.generator)
            batch = warp(batch, degrees, zoom, dy, dx)
        if s.contrast:
            factor = (1 + self._uniform(n, s.contrast))[:, None, None, None]
            mean = batch.mean(dim=(1, 2, 3), keepdim=True)
            batch = (batch - mean).mul_(factor).add_(mean)
        if s.brightness:
            batch = batch + self._uniform(n, s.brightness)[:, None, None, None]
        if s.contrast or s.brightness:
            batch = batch.clamp_(0.0, 1.0)
        return batch

    @property
    def _warps(self) -> bool:
        return bool(self.settings.rotate or self.settings.scale)


def seed_for(seed: int) -> int:
    """The augmentation generator's seed for a candidate's seed: apart from the batch-order generator's."""
    return (seed * 6364136223846793005 + 1442695040888963407) % (1 << 63)  # Knuth's LCG step: a fixed mix
