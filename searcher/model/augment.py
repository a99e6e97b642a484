"""Random changes to training batches, in batched tensor operations on the CPU.

Each batch is changed as a whole: one draw of every random number per image from the candidate's own
generator, then a few tensor operations over the batch (an index gather for whole-pixel shifts, one
resampling for rotation and zoom, arithmetic for brightness and contrast). Edges are repeated into
whatever a move uncovers, as a camera would see more of the same background. The trainer calls this on
training batches only; validation and test images are never changed.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from searcher.core.train_settings import AugmentSettings


def shift_edge(images: torch.Tensor, dy: torch.Tensor, dx: torch.Tensor) -> torch.Tensor:
    """Move image n down by dy[n] and right by dx[n] whole pixels (negative: up, left), repeating edge pixels.

    Works on any dtype (uint8 batches are shifted before they are converted): two gathers of rows and columns.
    """
    n, c, h, w = images.shape
    rows = (torch.arange(h) - dy[:, None]).clamp_(0, h - 1)  # N×H: source row of each output row
    cols = (torch.arange(w) - dx[:, None]).clamp_(0, w - 1)  # N×W: source column of each output column
    out = images.gather(2, rows[:, None, :, None].expand(n, c, h, w))
    return out.gather(3, cols[:, None, None, :].expand(n, c, h, w))


def warp(images: torch.Tensor, degrees: torch.Tensor, zoom: torch.Tensor, dy: torch.Tensor,
         dx: torch.Tensor) -> torch.Tensor:
    """Rotate image n by degrees[n] (counter-clockwise as displayed), zoom it by zoom[n] about its centre and
    move it by (dy[n], dx[n]) pixels, in one bilinear resampling of float N×C×H×W with edges repeated."""
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

    def before_float(self, batch: torch.Tensor) -> torch.Tensor:
        """Changes that need no interpolation, on the uint8 batch: whole-pixel shift (unless a warp follows) and flip."""
        s, n = self.settings, len(batch)
        if s.shift and not self._warps:
            dy, dx = (torch.randint(-s.shift, s.shift + 1, (2, n), generator=self.generator))
            batch = shift_edge(batch, dy, dx)
        if s.flip:
            mirror = torch.rand(n, generator=self.generator) < 0.5
            batch = torch.where(mirror[:, None, None, None], batch.flip(-1), batch)
        return batch

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
