"""Predicting training time from what this run has measured, so a time box is planned, not hit.

Training time is close to proportional to MACs times images seen (the forward and backward
passes are all multiply-accumulates); the run measures the seconds per MAC-image on the
candidates it has trained and predicts the next one from its MACs. The prediction errs long:
it is a guard against starting what cannot finish.

>>> rate = Throughput()
>>> rate.add(macs=1_000_000, images=2_000, seconds=4.0)
>>> rate.predict(macs=2_000_000, images=2_000)
8.0
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass
class Throughput:
    """Seconds per MAC-image over the candidates trained so far."""

    mac_images: float = 0.0  # sum over trained candidates of MACs x training images processed
    seconds: float = 0.0  # their training seconds

    def add(self, macs: int, images: int, seconds: float) -> None:
        """Count a candidate that processed ``images`` training images in ``seconds`` (none: nothing measured)."""
        if images > 0:
            self.mac_images += macs * images
            self.seconds += seconds

    def predict(self, macs: int, images: float) -> float | None:
        """Seconds to train a candidate of ``macs`` on ``images`` images in all; None before any measurement."""
        if not self.mac_images:
            return None
        return self.seconds / self.mac_images * macs * images
