"""Degrees of visual angle and pixels for a display at a viewing distance.

The exact relation is θ = 2·atan(s / 2d) for an extent ``s`` centred on the
line of sight at distance ``d``.  Pixel conversions use the centre of the
screen, where a stimulus of a few degrees sits.
"""

from __future__ import annotations

import math


def cm_to_deg(size_cm: float, distance_cm: float) -> float:
    """Visual angle (deg) of an extent centred on the line of sight.

    Parameters
    ----------
    size_cm : float
        Extent on the screen.
    distance_cm : float
        Eye-to-screen distance.
    """
    return math.degrees(2.0 * math.atan(size_cm / (2.0 * distance_cm)))


def deg_to_cm(angle_deg: float, distance_cm: float) -> float:
    """Extent on the screen (cm) that subtends ``angle_deg`` at the centre."""
    return 2.0 * distance_cm * math.tan(math.radians(angle_deg) / 2.0)


def px_per_cm(screen_cm: float, screen_px: int) -> float:
    """Pixels per centimetre along one screen axis."""
    return screen_px / screen_cm


def deg_to_px(angle_deg: float, distance_cm: float, screen_cm: float, screen_px: int) -> float:
    """Pixels that subtend ``angle_deg`` at the centre of the screen."""
    return deg_to_cm(angle_deg, distance_cm) * px_per_cm(screen_cm, screen_px)


def px_to_deg(size_px: float, distance_cm: float, screen_cm: float, screen_px: int) -> float:
    """Visual angle of ``size_px`` pixels centred on the line of sight."""
    return cm_to_deg(size_px / px_per_cm(screen_cm, screen_px), distance_cm)


def screen_extent_deg(distance_cm: float, screen_cm: float) -> float:
    """Full visual angle of one screen axis seen from its centre."""
    return cm_to_deg(screen_cm, distance_cm)
