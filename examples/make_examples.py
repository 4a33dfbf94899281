"""Build the bundled example models (how the committed .onnx and .npz files were made).

For each scenario this script
  1. synthesizes labelled data of our own (no downloads, fixed seeds),
  2. trains a small torch model on CPU (seconds to a few minutes, single-threaded),
  3. exports the float model with torch.onnx.export(..., dynamo=False, opset_version=17)
     to examples/<name>/<name>_float.onnx,
  4. quantizes it with onnxruntime.quantization.quantize_static, calibrated on generated
     data, to examples/<name>/<name>.onnx,
  5. writes examples/<name>/sample_inputs.npz ("inputs": 16 float32 inputs shaped like the
     model input, "labels": their int64 class ids) and examples/<name>/README.md,
  6. checks the result: onnx.checker, an onnxruntime session, the op types of the quantized
     graph and of the onnxruntime-optimized graph, and float vs quantized accuracy.

Run (needs torch, onnx, onnxruntime, numpy; not needed by the tests):
    python examples/make_examples.py            # build everything, then check
    python examples/make_examples.py --check    # only check the committed files
    python examples/make_examples.py pump_vibration   # build one scenario

Seeds are fixed and torch runs single-threaded, so reruns give the same models.
"""

from __future__ import annotations

import argparse
import collections
import json
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import onnx
import onnxruntime as ort
import torch
from onnxruntime.quantization import (
    CalibrationDataReader,
    CalibrationMethod,
    QuantFormat,
    QuantType,
    quantize_static,
)
from torch import nn

EXAMPLES_DIR = Path(__file__).resolve().parent
N_SAMPLE_INPUTS = 16

# Seed offsets per split, so train / calibration / test / sample data never overlap.
SPLIT_SEEDS = {"train": 1, "calib": 2, "test": 3, "sample": 4}


# --------------------------------------------------------------------------------------
# pump_vibration: 3-axis accelerometer on a water pump, 128 samples at 1 kHz
# --------------------------------------------------------------------------------------

PUMP_CLASSES = ["normal", "cavitation", "bearing_wear", "imbalance"]
PUMP_FS = 1000.0
PUMP_LEN = 128


def _pump_running_tones(rng: np.random.Generator, t: np.ndarray, f0: float, one_x: float):
    """Shaft 1x / 2x tones plus a 6-vane blade-pass tone on each axis (x, y radial; z axial)."""
    phase = rng.uniform(0, 2 * np.pi)
    axis_gain = np.array([1.0, 1.0, 0.4])[:, None]
    # Radial axes see the rotating force 90 degrees apart.
    axis_shift = np.array([0.0, np.pi / 2, rng.uniform(0, np.pi)])[:, None]
    one = one_x * np.sin(2 * np.pi * f0 * t + phase + axis_shift)
    two = 0.3 * one_x * np.sin(4 * np.pi * f0 * t + 2 * phase + rng.uniform(0, 2 * np.pi))
    blade = rng.uniform(0.05, 0.15) * np.sin(2 * np.pi * 6 * f0 * t + rng.uniform(0, 2 * np.pi))
    return axis_gain * (one + two) + blade


def _ringing_impulses(t, times, amp, f_ring, decay_s):
    """Sum of decaying sinusoids started at `times` (a struck structure ringing)."""
    out = np.zeros_like(t)
    for t0 in times:
        dt = t - t0
        live = dt >= 0
        out[live] += amp * np.exp(-dt[live] / decay_s) * np.sin(2 * np.pi * f_ring * dt[live])
    return out


def _pump_fault(rng: np.random.Generator, t: np.ndarray, label: int, f0: float) -> np.ndarray:
    """The part of the signal that tells the fault apart; shape [3, len]."""
    fault = np.zeros((3, t.size))
    if label == 1:  # cavitation: broadband hiss and bubble collapses at random times
        fault += rng.normal(0, rng.uniform(0.08, 0.18), size=fault.shape)
        times = np.sort(rng.uniform(-0.01, t[-1], size=rng.integers(2, 8)))
        for axis in range(3):
            fault[axis] += _ringing_impulses(t, times, rng.uniform(0.2, 0.45), 420.0, 0.002)
    elif label == 2:  # bearing wear: impulses at the outer-race defect rate, ringing ~300 Hz
        period = 1.0 / (rng.uniform(3.3, 3.8) * f0)
        times = np.arange(-rng.uniform(0, period), t[-1], period)
        ring_hz = rng.uniform(280, 340)
        ring = _ringing_impulses(t, times, rng.uniform(0.2, 0.45), ring_hz, 0.003)
        fault += np.array([1.0, 0.8, 0.5])[:, None] * ring
    return fault


def synth_pump(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    """n windows [3, 128] of pump vibration in g, with balanced class labels."""
    t = np.arange(PUMP_LEN) / PUMP_FS
    labels = np.arange(n) % len(PUMP_CLASSES)
    rng.shuffle(labels)
    x = np.empty((n, 3, PUMP_LEN), dtype=np.float32)
    for i, label in enumerate(labels):
        f0 = rng.uniform(24.0, 30.0)  # 1450..1800 rpm
        one_x = rng.uniform(0.55, 1.0) if label == 3 else rng.uniform(0.2, 0.55)
        signal = _pump_running_tones(rng, t, f0, one_x) + _pump_fault(rng, t, label, f0)
        signal += rng.normal(0, 0.06, size=signal.shape)
        x[i] = rng.uniform(0.7, 1.3) * signal  # sensor mounting changes the gain
    return x, labels.astype(np.int64)


class PumpNet(nn.Module):
    """1-D CNN: strided, dilated and padded Conv1d, ReLU, MaxPool1d, global average, Linear."""

    def __init__(self, n_classes: int = len(PUMP_CLASSES)):
        super().__init__()
        self.features = nn.Sequential(
            nn.Conv1d(3, 16, kernel_size=7, stride=2, padding=3),  # -> [16, 64]
            nn.BatchNorm1d(16),
            nn.ReLU(),
            nn.Conv1d(16, 24, kernel_size=5, dilation=2, padding=4),  # -> [24, 64]
            nn.BatchNorm1d(24),
            nn.ReLU(),
            nn.MaxPool1d(2),  # -> [24, 32]
            nn.Conv1d(24, 32, kernel_size=3, padding=1),  # -> [32, 32]
            nn.BatchNorm1d(32),
            nn.ReLU(),
            nn.AdaptiveAvgPool1d(1),  # exported as GlobalAveragePool
            nn.Flatten(),
        )
        self.classifier = nn.Linear(32, n_classes)

    def forward(self, x):
        return self.classifier(self.features(x))


# --------------------------------------------------------------------------------------
# door_camera: 32x32 RGB frames of a doorway, classes closed / open / person
# --------------------------------------------------------------------------------------

DOOR_CLASSES = ["closed", "open", "person"]
DOOR_SIZE = 32


def _lit_wall(rng: np.random.Generator) -> np.ndarray:
    """Wall colour under a linear lighting gradient from a random direction; [3, H, W]."""
    yy, xx = np.mgrid[0:DOOR_SIZE, 0:DOOR_SIZE] / (DOOR_SIZE - 1)
    angle = rng.uniform(0, 2 * np.pi)
    light = 0.75 + rng.uniform(0.1, 0.35) * (np.cos(angle) * xx + np.sin(angle) * yy - 0.5)
    base = rng.uniform(0.45, 0.9, size=3)
    return base[:, None, None] * light[None]


def _paint(img: np.ndarray, top: int, bottom: int, left: int, right: int, colour) -> None:
    img[:, top:bottom, left:right] = np.asarray(colour)[:, None, None]


def _draw_person(rng: np.random.Generator, img: np.ndarray, frame) -> None:
    """Head disc and torso block standing in the doorway."""
    top, bottom, left, right = frame
    cx = rng.integers(left + 1, right - 1)  # the opening is at least 7 px wide
    head_r = rng.uniform(1.8, 2.8)
    head_y = top + rng.integers(3, 7)
    yy, xx = np.mgrid[0:DOOR_SIZE, 0:DOOR_SIZE]
    head = (yy - head_y) ** 2 + (xx - cx) ** 2 <= head_r**2
    img[:, head] = rng.uniform([0.55, 0.35, 0.25], [0.95, 0.75, 0.6])[:, None]
    half = rng.integers(3, 5)
    shirt = rng.uniform(0.05, 0.95, size=3)
    _paint(img, int(head_y + head_r), bottom, max(cx - half, 0), cx + half, shirt)


def _draw_door(rng: np.random.Generator, img: np.ndarray, label: int) -> None:
    """Frame, and either the closed panel with a handle or the dark opening."""
    width, height = rng.integers(11, 17), rng.integers(22, 29)
    left = rng.integers(2, DOOR_SIZE - width - 2)
    top = rng.integers(1, DOOR_SIZE - height)
    bottom, right = top + height, left + width
    frame_colour = rng.uniform(0.1, 0.5, size=3)
    _paint(img, top - 1, bottom, left - 1, right + 1, frame_colour)
    panel = rng.uniform(0.25, 0.8, size=3) * np.array([1.0, 0.8, 0.6])  # wood-ish
    if label == 0:
        _paint(img, top, bottom, left, right, panel)
        handle_x = right - 3 if rng.random() < 0.5 else left + 2
        handle_y = top + height // 2
        _paint(img, handle_y, handle_y + 2, handle_x, handle_x + 1, rng.uniform(0.8, 1.0, 3))
        return
    _paint(img, top, bottom, left, right, rng.uniform(0.0, 0.25, size=3))  # dark interior
    leaf = rng.integers(2, 5)  # the swung-open panel seen edge-on
    if rng.random() < 0.5:
        _paint(img, top, bottom, left, left + leaf, panel)
        left += leaf
    else:
        _paint(img, top, bottom, right - leaf, right, panel)
        right -= leaf
    if label == 2:
        _draw_person(rng, img, (top, bottom, left, right))


def synth_door(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    """n RGB images [3, 32, 32] in 0..1 with balanced labels closed / open / person."""
    labels = np.arange(n) % len(DOOR_CLASSES)
    rng.shuffle(labels)
    x = np.empty((n, 3, DOOR_SIZE, DOOR_SIZE), dtype=np.float32)
    for i, label in enumerate(labels):
        img = _lit_wall(rng)
        _draw_door(rng, img, label)
        img = img * rng.uniform(0.6, 1.3) + rng.normal(0, rng.uniform(0.01, 0.06), img.shape)
        x[i] = np.clip(img, 0.0, 1.0)
    return x, labels.astype(np.int64)


class DoorNet(nn.Module):
    """Stem conv, a depthwise-separable residual block, a strided depthwise block, GAP, Linear."""

    def __init__(self, n_classes: int = len(DOOR_CLASSES)):
        super().__init__()
        self.stem = nn.Sequential(
            nn.Conv2d(3, 16, 3, stride=2, padding=1), nn.BatchNorm2d(16), nn.ReLU6()
        )  # -> [16, 16, 16]
        self.block = nn.Sequential(
            nn.Conv2d(16, 16, 3, padding=1, groups=16), nn.BatchNorm2d(16), nn.ReLU6(),
            nn.Conv2d(16, 16, 1), nn.BatchNorm2d(16),
        )
        self.block_act = nn.ReLU6()
        self.down = nn.Sequential(
            nn.Conv2d(16, 16, 3, stride=2, padding=1, groups=16), nn.BatchNorm2d(16), nn.ReLU6(),
            nn.Conv2d(16, 32, 1), nn.BatchNorm2d(32), nn.ReLU6(),
        )  # -> [32, 8, 8]
        self.pool = nn.AdaptiveAvgPool2d(1)  # exported as GlobalAveragePool
        self.flatten = nn.Flatten()
        self.classifier = nn.Linear(32, n_classes)

    def forward(self, x):
        stem = self.stem(x)
        x = self.block_act(stem + self.block(stem))  # residual Add
        x = self.down(x)
        return self.classifier(self.flatten(self.pool(x)))


# --------------------------------------------------------------------------------------
# gesture_band: wrist IMU (accel xyz in g, gyro xyz in rad/s), 64 samples at 50 Hz
# --------------------------------------------------------------------------------------

GESTURE_CLASSES = ["idle", "wave", "flick_left", "flick_right", "twist"]
GESTURE_FS = 50.0
GESTURE_LEN = 64


def _gravity_pose(rng: np.random.Generator) -> np.ndarray:
    """A random resting wrist pose: unit gravity vector roughly 'down' in the band frame."""
    g = np.array([0.0, 0.0, -1.0]) + rng.normal(0, 0.35, size=3)
    return g / np.linalg.norm(g)


def _pulse(t: np.ndarray, t0: float, width: float) -> np.ndarray:
    return np.exp(-0.5 * ((t - t0) / width) ** 2)


def _gesture_motion(rng: np.random.Generator, t: np.ndarray, label: int, gravity: np.ndarray):
    """Accelerometer [3, len] and gyroscope [3, len] for one gesture."""
    acc = np.repeat(gravity[:, None], t.size, axis=1)
    gyro = np.zeros((3, t.size))
    if label == 1:  # wave: side-to-side oscillation at 2..3.5 Hz
        f = rng.uniform(2.0, 3.5)
        env = np.clip(np.sin(np.pi * (t - t[0]) / (t[-1] - t[0])) * 1.5, 0, 1)
        phase = rng.uniform(0, 2 * np.pi)
        acc[1] += rng.uniform(0.15, 0.5) * env * np.sin(2 * np.pi * f * t + phase)
        gyro[2] += rng.uniform(0.8, 2.5) * env * np.cos(2 * np.pi * f * t + phase)
    elif label in (2, 3):  # flick: sharp push then rebound along x, yaw kick
        sign = -1.0 if label == 2 else 1.0
        t0 = rng.uniform(0.3, 0.95)
        w = rng.uniform(0.03, 0.06)
        amp = rng.uniform(0.5, 1.4)
        acc[0] += sign * amp * (_pulse(t, t0, w) - 0.6 * _pulse(t, t0 + 2.5 * w, 1.5 * w))
        gyro[2] += sign * rng.uniform(1.0, 3.0) * _pulse(t, t0 + w, w)
    elif label == 4:  # twist: roll about the forearm axis, gravity turns in the y-z plane
        t0, dur = rng.uniform(0.15, 0.6), rng.uniform(0.4, 0.6)
        active = (t >= t0) & (t <= t0 + dur)
        rate = np.zeros_like(t)
        rate[active] = rng.choice([-1, 1]) * rng.uniform(1.5, 4.0) * np.sin(
            np.pi * (t[active] - t0) / dur
        )
        gyro[0] += rate
        angle = np.cumsum(rate) / GESTURE_FS
        c, s = np.cos(angle), np.sin(angle)
        acc[1], acc[2] = c * gravity[1] - s * gravity[2], s * gravity[1] + c * gravity[2]
    return acc, gyro


def synth_gesture(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    """n IMU windows [6, 64] (accel xyz, gyro xyz) with balanced gesture labels."""
    t = np.arange(GESTURE_LEN) / GESTURE_FS
    labels = np.arange(n) % len(GESTURE_CLASSES)
    rng.shuffle(labels)
    x = np.empty((n, 6, GESTURE_LEN), dtype=np.float32)
    for i, label in enumerate(labels):
        acc, gyro = _gesture_motion(rng, t, label, _gravity_pose(rng))
        drift = rng.normal(0, 0.05, size=(6, 1)) * np.linspace(-1, 1, t.size)  # slow drift
        # The arm also wanders slowly whatever the gesture, so idle is not simply "still".
        wander_gain = np.concatenate([np.full(3, 0.12), np.full(3, 0.8)])[:, None]
        wander = wander_gain * rng.uniform(0, 1, size=(6, 1)) * np.sin(
            2 * np.pi * rng.uniform(0.3, 1.2) * t + rng.uniform(0, 2 * np.pi, size=(6, 1))
        )
        bias = np.concatenate([rng.normal(0, 0.03, 3), rng.normal(0, 0.1, 3)])[:, None]
        noise = np.concatenate([rng.normal(0, 0.06, acc.shape), rng.normal(0, 0.3, gyro.shape)])
        x[i] = np.concatenate([acc, gyro]) + bias + drift + wander + noise
    return x, labels.astype(np.int64)


class GestureNet(nn.Module):
    """Two parallel conv branches (HardSwish / Tanh) joined by Concat, AvgPool, Sigmoid conv,
    Linear and a final Softmax (the model outputs probabilities)."""

    def __init__(self, n_classes: int = len(GESTURE_CLASSES)):
        super().__init__()
        self.short_branch = nn.Conv1d(6, 12, kernel_size=3, padding=1)
        self.short_act = nn.Hardswish()
        self.long_branch = nn.Conv1d(6, 12, kernel_size=5, dilation=2, padding=4)
        self.long_act = nn.Tanh()
        self.pool = nn.AvgPool1d(4)  # [24, 64] -> [24, 16]
        self.mix = nn.Conv1d(24, 16, kernel_size=3, padding=1)
        self.mix_act = nn.Sigmoid()
        self.flatten = nn.Flatten()
        self.classifier = nn.Linear(16 * 16, n_classes)
        self.softmax = nn.Softmax(dim=1)

    def logits(self, x):
        short = self.short_act(self.short_branch(x))
        long = self.long_act(self.long_branch(x))
        x = self.pool(torch.cat([short, long], dim=1))
        return self.classifier(self.flatten(self.mix_act(self.mix(x))))

    def forward(self, x):
        return self.softmax(self.logits(x))


# --------------------------------------------------------------------------------------
# recycling_belt: 64x64 RGB camera over the infeed conveyor of a recycling sorter
# --------------------------------------------------------------------------------------

BELT_CLASSES = ["empty", "can", "bottle", "carton", "paper", "film"]
BELT_SIZE = 64


def _smooth_noise(rng: np.random.Generator, cells: int) -> np.ndarray:
    """Low-frequency noise in about -1..1 on the BELT_SIZE grid: a random cells x cells
    lattice, bilinearly interpolated."""
    lattice = rng.uniform(-1, 1, size=(cells + 1, cells + 1))
    pos = np.linspace(0, cells, BELT_SIZE)
    i = np.minimum(pos.astype(int), cells - 1)
    f = pos - i
    rows = lattice[i] * (1 - f)[:, None] + lattice[i + 1] * f[:, None]  # [H, cells + 1]
    return rows[:, i] * (1 - f)[None] + rows[:, i + 1] * f[None]


def _belt(rng: np.random.Generator) -> np.ndarray:
    """Dark rubber belt running top to bottom: ribs across it, a seam, stains, uneven light."""
    yy, xx = np.mgrid[0:BELT_SIZE, 0:BELT_SIZE].astype(float)
    shade = rng.uniform(0.12, 0.3)
    tint = shade * rng.uniform(0.9, 1.1, size=3)
    rib_period = rng.uniform(3.0, 7.0)
    ribs = 0.04 * np.sin(2 * np.pi * (yy + rng.uniform(0, 10)) / rib_period)
    grain = 0.03 * rng.normal(size=(BELT_SIZE, 1)) * np.ones((1, BELT_SIZE))  # streaks along y
    img = tint[:, None, None] + (ribs + grain + 0.05 * _smooth_noise(rng, 4))[None]
    if rng.random() < 0.4:  # the belt splice passing under the camera
        y0 = rng.integers(0, BELT_SIZE - 2)
        img[:, y0 : y0 + 2] += rng.uniform(0.08, 0.2)
    angle = rng.uniform(0, 2 * np.pi)  # the lamp is not straight above
    light = 1.0 + rng.uniform(0.1, 0.4) * (
        np.cos(angle) * (xx / BELT_SIZE - 0.5) + np.sin(angle) * (yy / BELT_SIZE - 0.5))
    return img * light[None]


def _object_frame(rng: np.random.Generator, margin: float = 8.0):
    """Pixel coordinates (u along the item, v across it) for a randomly placed and turned item."""
    yy, xx = np.mgrid[0:BELT_SIZE, 0:BELT_SIZE].astype(float)
    cx, cy = rng.uniform(margin, BELT_SIZE - margin, size=2)
    angle = rng.uniform(0, np.pi)
    c, s = np.cos(angle), np.sin(angle)
    return c * (xx - cx) + s * (yy - cy), -s * (xx - cx) + c * (yy - cy)


def _blend(img: np.ndarray, mask: np.ndarray, colour: np.ndarray, alpha: float = 1.0) -> None:
    """Paint colour [3, H, W] (or [3]) over img where mask (bool or 0..1) is set."""
    weight = alpha * mask.astype(float)
    colour = colour if colour.ndim == 3 else colour[:, None, None]
    img[:] = img * (1 - weight)[None] + colour * weight[None]


def _draw_can(rng: np.random.Generator, img: np.ndarray) -> None:
    """Aluminium can lying on its side: printed body, silver rims, a bright highlight line."""
    u, v = _object_frame(rng)
    half_len, radius = rng.uniform(9, 15), rng.uniform(4.5, 7.5)
    squash = rng.uniform(0.6, 1.0)  # crushed cans are flatter
    radius *= squash
    body = (np.abs(u) <= half_len) & (np.abs(v) <= radius)
    across = np.clip(v / radius, -1, 1)
    metal = 0.55 + 0.35 * np.cos(np.pi * across * rng.uniform(0.8, 1.6))  # curved sheen
    paint = rng.uniform(0.1, 0.95, size=3)
    colour = paint[:, None, None] * metal[None]
    rims = np.abs(np.abs(u) - half_len) <= 1.2
    colour = np.where(rims[None], metal[None] * 0.95, colour)
    highlight = np.abs(v - rng.uniform(-0.4, 0.4) * radius) <= 0.7
    colour = np.where(highlight[None], 0.98, colour)
    if rng.random() < 0.5:  # a printed band around the body
        band = np.abs(u - rng.uniform(-0.5, 0.5) * half_len) <= rng.uniform(1.5, 4)
        colour = np.where(band[None], rng.uniform(0.2, 1.0, size=3)[:, None, None] * metal, colour)
    _blend(img, body, colour)


def _draw_bottle(rng: np.random.Generator, img: np.ndarray) -> None:
    """PET bottle: see-through tinted body and neck with a coloured cap and a long glint."""
    u, v = _object_frame(rng)
    half_len, radius = rng.uniform(11, 18), rng.uniform(4, 7)
    neck_len = rng.uniform(0.25, 0.45) * half_len
    body = (np.abs(u) <= half_len) & (np.abs(v) <= radius)
    shoulder = (u > half_len) & (u <= half_len + neck_len)
    neck_r = radius * (1 - 0.6 * (u - half_len) / neck_len)
    neck = shoulder & (np.abs(v) <= np.maximum(neck_r, 1.2))
    cap = (u > half_len + neck_len) & (u <= half_len + neck_len + 2.5) & (np.abs(v) <= 2.0)
    tints = [(0.75, 0.85, 0.9), (0.35, 0.7, 0.35), (0.6, 0.4, 0.2), (0.45, 0.6, 0.85)]
    tint = np.array(tints[rng.integers(len(tints))]) * rng.uniform(0.8, 1.1)
    _blend(img, body | neck, tint, alpha=rng.uniform(0.3, 0.75))
    glint = (body | neck) & (np.abs(v - 0.45 * radius) <= 0.8)
    _blend(img, glint, np.full(3, 0.95), alpha=0.8)
    if rng.random() < 0.6:  # a wrap-around label
        label = body & (np.abs(u) <= rng.uniform(0.3, 0.6) * half_len)
        _blend(img, label, rng.uniform(0.2, 1.0, size=3))
    _blend(img, cap, rng.uniform(0.0, 1.0, size=3))


def _draw_carton(rng: np.random.Generator, img: np.ndarray) -> None:
    """Flattened cardboard box: brown with corrugation ridges, fold lines and often tape."""
    u, v = _object_frame(rng, margin=12.0)
    half_u, half_v = rng.uniform(10, 20), rng.uniform(7, 15)
    sheet = (np.abs(u) <= half_u) & (np.abs(v) <= half_v)
    brown = np.array([0.62, 0.45, 0.27]) * rng.uniform(0.6, 1.25) + rng.normal(0, 0.04, 3)
    ridges = 1 + 0.06 * np.sin(2 * np.pi * u / rng.uniform(1.8, 3.0))
    colour = brown[:, None, None] * ridges[None]
    folds = np.abs(np.abs(v) - rng.uniform(0.3, 0.7) * half_v) <= 0.6
    colour = np.where(folds[None], colour * 0.75, colour)
    if rng.random() < 0.6:
        tape = np.abs(v - rng.uniform(-0.3, 0.3) * half_v) <= rng.uniform(1.5, 3.0)
        tape_colour = [0.85, 0.8, 0.6] if rng.random() < 0.5 else [0.7, 0.55, 0.35]
        colour = np.where(tape[None], np.array(tape_colour)[:, None, None], colour)
    _blend(img, sheet, colour)


def _draw_paper(rng: np.random.Generator, img: np.ndarray) -> None:
    """Crumpled printed sheet: off-white, creased shading, rows of dark text."""
    u, v = _object_frame(rng, margin=10.0)
    half_u, half_v = rng.uniform(8, 17), rng.uniform(8, 17)
    wobble = 2.0 * _smooth_noise(rng, 3)  # crumpled edges
    sheet = (np.abs(u + wobble) <= half_u) & (np.abs(v - wobble) <= half_v)
    white = rng.uniform(0.75, 1.0) * np.array([1.0, 1.0, rng.uniform(0.85, 1.0)])
    creases = 1 + 0.18 * _smooth_noise(rng, 6)
    colour = white[:, None, None] * creases[None]
    pitch = rng.uniform(2.5, 4.5)
    text = (np.mod(v, pitch) < 1.0) & (np.abs(u) <= 0.8 * half_u) & (np.abs(v) <= 0.8 * half_v)
    text &= _smooth_noise(rng, 12) > -0.3  # words and gaps
    colour = np.where(text[None], colour * rng.uniform(0.25, 0.6), colour)
    _blend(img, sheet, colour)


def _draw_film(rng: np.random.Generator, img: np.ndarray) -> None:
    """Plastic bag or foil: an irregular see-through blob with bright wrinkle streaks."""
    u, v = _object_frame(rng, margin=10.0)
    theta, r = np.arctan2(v, u), np.hypot(u, v)
    edge = rng.uniform(8, 15) * (1 + sum(
        rng.uniform(0, 0.25) * np.cos(k * theta + rng.uniform(0, 2 * np.pi)) for k in range(2, 6)))
    blob = r <= edge
    colour = np.array([0.9, 0.9, 0.95]) if rng.random() < 0.5 else rng.uniform(0.2, 1.0, 3)
    _blend(img, blob, colour, alpha=rng.uniform(0.3, 0.6))
    freq = rng.uniform(0.5, 1.2)
    wrinkles = np.sin(freq * u + 3 * _smooth_noise(rng, 3)) > 0.85
    _blend(img, blob & wrinkles, np.full(3, 0.95), alpha=rng.uniform(0.4, 0.8))


def _scatter_debris(rng: np.random.Generator, img: np.ndarray, count: int) -> None:
    """Small fragments (shreds, caps, grit) that the sorter ignores."""
    yy, xx = np.mgrid[0:BELT_SIZE, 0:BELT_SIZE].astype(float)
    for _ in range(count):
        cy, cx = rng.uniform(0, BELT_SIZE, size=2)
        ry, rx = rng.uniform(0.6, 3.5, size=2)
        spot = ((yy - cy) / ry) ** 2 + ((xx - cx) / rx) ** 2 <= 1
        _blend(img, spot, rng.uniform(0.0, 1.0, size=3), alpha=rng.uniform(0.5, 1.0))


def _motion_blur(img: np.ndarray, length: int) -> np.ndarray:
    """The belt moves during the exposure: average `length` rows (edges repeated)."""
    padded = np.concatenate([img[:, :1]] * (length - 1) + [img], axis=1)
    return sum(padded[:, k : k + BELT_SIZE] for k in range(length)) / length


BELT_ITEMS = [None, _draw_can, _draw_bottle, _draw_carton, _draw_paper, _draw_film]


def synth_belt(rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
    """n RGB frames [3, 64, 64] in 0..1 with balanced labels, one item (or none) each."""
    labels = np.arange(n) % len(BELT_CLASSES)
    rng.shuffle(labels)
    x = np.empty((n, 3, BELT_SIZE, BELT_SIZE), dtype=np.float32)
    for i, label in enumerate(labels):
        img = _belt(rng)
        _scatter_debris(rng, img, rng.integers(0, 8))
        if BELT_ITEMS[label] is not None:
            BELT_ITEMS[label](rng, img)
        _scatter_debris(rng, img, rng.integers(0, 4))  # some lie on top of the item
        img = _motion_blur(img, rng.integers(1, 5))
        img = img * rng.uniform(0.7, 1.3) + rng.normal(0, rng.uniform(0.01, 0.05), img.shape)
        x[i] = np.clip(img, 0.0, 1.0)
    return x, labels.astype(np.int64)


class InvertedResidual(nn.Module):
    """1x1 expand, ReLU6, 3x3 depthwise, ReLU6, 1x1 linear project; plus the input when the
    shapes allow it."""

    def __init__(self, in_c: int, out_c: int, stride: int, expand: int = 6):
        super().__init__()
        mid = in_c * expand
        self.residual = stride == 1 and in_c == out_c
        self.body = nn.Sequential(
            nn.Conv2d(in_c, mid, 1, bias=False), nn.BatchNorm2d(mid), nn.ReLU6(),
            nn.Conv2d(mid, mid, 3, stride=stride, padding=1, groups=mid, bias=False),
            nn.BatchNorm2d(mid), nn.ReLU6(),
            nn.Conv2d(mid, out_c, 1, bias=False), nn.BatchNorm2d(out_c),
        )

    def forward(self, x):
        return x + self.body(x) if self.residual else self.body(x)


class BeltNet(nn.Module):
    """Stem conv, four inverted-residual blocks (two with a residual Add), GAP, Linear."""

    def __init__(self, n_classes: int = len(BELT_CLASSES)):
        super().__init__()
        self.stem = nn.Sequential(
            nn.Conv2d(3, 16, 3, stride=2, padding=1, bias=False), nn.BatchNorm2d(16), nn.ReLU6()
        )  # -> [16, 32, 32]
        self.blocks = nn.Sequential(
            InvertedResidual(16, 16, 1),  # 96 expanded channels at 32x32, residual
            InvertedResidual(16, 24, 2),  # -> [24, 16, 16]
            InvertedResidual(24, 24, 1),  # residual
            InvertedResidual(24, 32, 2),  # -> [32, 8, 8]
        )
        self.pool = nn.AdaptiveAvgPool2d(1)  # exported as GlobalAveragePool
        self.flatten = nn.Flatten()
        self.classifier = nn.Linear(32, n_classes)

    def forward(self, x):
        return self.classifier(self.flatten(self.pool(self.blocks(self.stem(x)))))


# --------------------------------------------------------------------------------------
# Scenario table
# --------------------------------------------------------------------------------------


@dataclass
class Scenario:
    """Everything needed to build, quantize and describe one example model."""

    name: str
    seed: int
    classes: list[str]
    input_shape: tuple[int, ...]  # including the batch dimension of 1
    synth: Callable[[np.random.Generator, int], tuple[np.ndarray, np.ndarray]]
    make_model: Callable[[], nn.Module]
    output_name: str
    epochs: int
    n_train: int
    quant_format: QuantFormat
    activation_type: QuantType
    weight_type: QuantType
    per_channel: bool
    extra_options: dict = field(default_factory=dict)
    op_types_to_quantize: list[str] | None = None  # None: onnxruntime's default list
    description: str = ""
    quant_note: str = ""
    n_test: int = 300
    n_calib: int = 128


SCENARIOS = [
    Scenario(
        name="pump_vibration",
        seed=1100,
        classes=PUMP_CLASSES,
        input_shape=(1, 3, PUMP_LEN),
        synth=synth_pump,
        make_model=PumpNet,
        output_name="logits",
        epochs=12,
        n_train=1600,
        quant_format=QuantFormat.QDQ,
        activation_type=QuantType.QUInt8,
        weight_type=QuantType.QInt8,
        per_channel=True,
        description=(
            "A 3-axis accelerometer bolted to a water pump housing, sampled at 1 kHz; one "
            "window is 128 samples (128 ms) per axis, in g. Signals are synthetic: shaft 1x/2x "
            "tones at 24-30 Hz with a 6-vane blade-pass tone, plus noise. Cavitation adds "
            "broadband hiss and randomly timed ringing bubble collapses; bearing wear adds "
            "periodic impulses at ~3.5x shaft speed ringing near 300 Hz; imbalance has a "
            "3-5x stronger 1x tone, 90 degrees apart on the radial axes."
        ),
        quant_note=(
            "QDQ format, uint8 activations (QuantType.QUInt8, asymmetric), int8 weights "
            "per output channel (per_channel=True), int32 biases, MinMax calibration. "
            "BatchNorm layers were folded into the convolutions by the exporter."
        ),
    ),
    Scenario(
        name="door_camera",
        seed=2200,
        classes=DOOR_CLASSES,
        input_shape=(1, 3, DOOR_SIZE, DOOR_SIZE),
        synth=synth_door,
        make_model=DoorNet,
        output_name="logits",
        epochs=10,
        n_train=1500,
        quant_format=QuantFormat.QOperator,
        activation_type=QuantType.QInt8,
        weight_type=QuantType.QInt8,
        per_channel=True,
        description=(
            "A low-resolution RGB camera looking at a doorway, 32x32 pixels, values 0..1 "
            "(NCHW). Images are synthetic: a wall under a random lighting gradient, a door "
            "frame of random size and place, and either a closed wooden panel with a handle, "
            "a dark opening with the door leaf seen edge-on, or the opening with a person "
            "(head disc and torso) in it; random exposure and sensor noise."
        ),
        quant_note=(
            "QOperator format (QLinearConv, QLinearAdd, QLinearGlobalAveragePool, QGemm), "
            "int8 activations (QuantType.QInt8, asymmetric) and int8 weights per output "
            "channel (per_channel=True), int32 biases, MinMax calibration. BatchNorm layers "
            "were folded into the convolutions by the exporter; the quantizer drops the "
            "ReLU6 (Clip 0..6) nodes and folds them into the output ranges of the producers, "
            "but leaves the Constant nodes that held the Clip bounds in the graph, unused. "
            "QLinearConv is a standard ONNX op; the other three are com.microsoft ops."
        ),
    ),
    Scenario(
        name="gesture_band",
        seed=3300,
        classes=GESTURE_CLASSES,
        input_shape=(1, 6, GESTURE_LEN),
        synth=synth_gesture,
        make_model=GestureNet,
        output_name="probs",
        epochs=30,
        n_train=3000,
        quant_format=QuantFormat.QDQ,
        activation_type=QuantType.QInt8,
        weight_type=QuantType.QInt8,
        per_channel=False,
        extra_options={"ActivationSymmetric": False},
        # Tanh and HardSwish are not in onnxruntime's default list. In this graph they get
        # Q/DQ on both sides anyway because their neighbours are quantized (checked: the
        # default list gives the same graph); naming every op type keeps it that way.
        op_types_to_quantize=[
            "Conv", "HardSwish", "Tanh", "Concat", "AveragePool", "Sigmoid", "Flatten",
            "Gemm", "Softmax",
        ],
        description=(
            "A wrist band IMU: accelerometer x/y/z in g and gyroscope x/y/z in rad/s, "
            "sampled at 50 Hz; one window is 64 samples (1.28 s), channel order "
            "ax, ay, az, gx, gy, gz. Signals are synthetic: gravity for a random wrist pose, "
            "bias, drift and noise, plus the gesture: a 2-3.5 Hz side-to-side wave, a sharp "
            "flick to the left or right (push, rebound and yaw kick), or a twist of the "
            "forearm (roll rate bump with gravity turning in the y-z plane)."
        ),
        quant_note=(
            "QDQ format, int8 activations (QuantType.QInt8, asymmetric: ActivationSymmetric "
            "False), int8 weights per tensor (per_channel=False), int32 biases, MinMax "
            "calibration. The output is Softmax probabilities, quantized then dequantized."
        ),
    ),
    Scenario(
        name="recycling_belt",
        seed=4400,
        classes=BELT_CLASSES,
        input_shape=(1, 3, BELT_SIZE, BELT_SIZE),
        synth=synth_belt,
        make_model=BeltNet,
        output_name="logits",
        epochs=8,
        n_train=3000,
        quant_format=QuantFormat.QDQ,
        activation_type=QuantType.QUInt8,
        weight_type=QuantType.QInt8,
        per_channel=True,
        description=(
            "An RGB camera looking down on the infeed conveyor of a recycling sorter, 64x64 "
            "pixels, values 0..1 (NCHW); the sorter's air jets act on the class. Images are "
            "synthetic: a dark ribbed rubber belt (splice seam, stains, a lamp off to one "
            "side) with small debris, and at most one item, placed and turned at random: an "
            "aluminium can on its side (printed body, rims, highlight; some crushed flat), a "
            "see-through tinted PET bottle with neck, cap and label, a flattened corrugated "
            "carton with folds and tape, a crumpled printed sheet of paper, or a plastic film "
            "blob with wrinkle glints; motion blur along the belt, random exposure and "
            "sensor noise."
        ),
        quant_note=(
            "QDQ format, uint8 activations (QuantType.QUInt8, asymmetric), int8 weights "
            "per output channel (per_channel=True), int32 biases, MinMax calibration. "
            "BatchNorm layers were folded into the convolutions by the exporter. Four "
            "inverted-residual blocks (1x1 expand x6, ReLU6, 3x3 depthwise, ReLU6, 1x1 linear "
            "project), the first at 32x32 with 96 expanded channels; the two blocks whose "
            "input and output shapes match add their input back. The quantizer drops the "
            "ReLU6 (Clip 0..6) nodes, folding them into the output ranges of the producers, "
            "and leaves the Constant nodes that held the Clip bounds unused."
        ),
    ),
]


# --------------------------------------------------------------------------------------
# Train, export, quantize
# --------------------------------------------------------------------------------------


def scenario_data(scn: Scenario, split: str, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Generated data for one split; the seed depends on the scenario and the split only."""
    return scn.synth(np.random.default_rng(scn.seed + SPLIT_SEEDS[split]), n)


def logits_of(model: nn.Module, x: torch.Tensor) -> torch.Tensor:
    """Pre-softmax scores, for models whose forward() already ends in Softmax."""
    return model.logits(x) if hasattr(model, "logits") else model(x)


def train(scn: Scenario) -> nn.Module:
    """Train the scenario's model with Adam on its generated training split."""
    torch.manual_seed(scn.seed)
    x, y = scenario_data(scn, "train", scn.n_train)
    x, y = torch.from_numpy(x), torch.from_numpy(y)
    model = scn.make_model()
    opt = torch.optim.Adam(model.parameters(), lr=3e-3)
    sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=scn.epochs)
    gen = torch.Generator().manual_seed(scn.seed)
    model.train()
    for _ in range(scn.epochs):
        for idx in torch.randperm(len(x), generator=gen).split(64):
            opt.zero_grad()
            loss = nn.functional.cross_entropy(logits_of(model, x[idx]), y[idx])
            loss.backward()
            opt.step()
        sched.step()
    model.eval()
    return model


def export_float(scn: Scenario, model: nn.Module, path: Path) -> None:
    """Float ONNX export with a fixed batch of 1 (static shapes for the microcontroller)."""
    dummy = torch.zeros(scn.input_shape)
    torch.onnx.export(
        model,
        (dummy,),
        str(path),
        input_names=["input"],
        output_names=[scn.output_name],
        dynamo=False,
        opset_version=17,
        do_constant_folding=True,
    )
    onnx.checker.check_model(onnx.load(str(path)), full_check=True)


class ArrayReader(CalibrationDataReader):
    """Feeds calibration inputs one at a time (the model has a fixed batch of 1)."""

    def __init__(self, inputs: np.ndarray, input_name: str = "input"):
        self.inputs = inputs
        self.input_name = input_name
        self.pos = 0

    def get_next(self):
        if self.pos >= len(self.inputs):
            return None
        self.pos += 1
        return {self.input_name: self.inputs[self.pos - 1 : self.pos]}

    def rewind(self):
        self.pos = 0


def quantize(scn: Scenario, float_path: Path, quant_path: Path) -> None:
    """Static quantization calibrated on the scenario's calibration split."""
    calib, _ = scenario_data(scn, "calib", scn.n_calib)
    quantize_static(
        str(float_path),
        str(quant_path),
        ArrayReader(calib),
        quant_format=scn.quant_format,
        op_types_to_quantize=scn.op_types_to_quantize,
        per_channel=scn.per_channel,
        activation_type=scn.activation_type,
        weight_type=scn.weight_type,
        calibrate_method=CalibrationMethod.MinMax,
        extra_options=dict(scn.extra_options),
    )


def write_sample_inputs(scn: Scenario, folder: Path) -> None:
    x, y = scenario_data(scn, "sample", N_SAMPLE_INPUTS)
    x = x.reshape((N_SAMPLE_INPUTS, *scn.input_shape)).astype(np.float32)
    np.savez(folder / "sample_inputs.npz", inputs=x, labels=y)


# --------------------------------------------------------------------------------------
# Checks and report
# --------------------------------------------------------------------------------------


OPT_LEVELS = {
    "extended": ort.GraphOptimizationLevel.ORT_ENABLE_EXTENDED,
    "all": ort.GraphOptimizationLevel.ORT_ENABLE_ALL,  # adds CPU-specific layout changes
}


def make_session(
    path: Path, level: str = "all", optimized_out: Path | None = None
) -> ort.InferenceSession:
    """CPU session; with optimized_out, also dump the graph as optimized at `level`."""
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    opts.graph_optimization_level = OPT_LEVELS[level]
    if optimized_out is not None:
        opts.optimized_model_filepath = str(optimized_out)
    return ort.InferenceSession(str(path), opts, providers=["CPUExecutionProvider"])


def op_counts(model: onnx.ModelProto) -> dict[str, int]:
    """Op type -> count, with the domain prefixed for non-standard ops."""
    counts = collections.Counter(
        f"{n.domain}.{n.op_type}" if n.domain not in ("", "ai.onnx") else n.op_type
        for n in model.graph.node
    )
    return dict(sorted(counts.items()))


def accuracy(session: ort.InferenceSession, x: np.ndarray, y: np.ndarray) -> float:
    name = session.get_inputs()[0].name
    preds = [int(np.argmax(session.run(None, {name: x[i : i + 1]})[0])) for i in range(len(x))]
    return float(np.mean(np.array(preds) == y))


def tensor_shapes(values) -> dict[str, list]:
    return {
        v.name: [d.dim_value if d.HasField("dim_value") else d.dim_param
                 for d in v.type.tensor_type.shape.dim]
        for v in values
    }


def weight_bytes(model: onnx.ModelProto) -> int:
    return sum(onnx.numpy_helper.to_array(t).nbytes for t in model.graph.initializer)


def unused_nodes(model: onnx.ModelProto) -> list[str]:
    """Op types of nodes whose outputs no node and no graph output reads."""
    read = {name for n in model.graph.node for name in n.input}
    read |= {o.name for o in model.graph.output}
    return [n.op_type for n in model.graph.node if not any(o in read for o in n.output)]


def input_feeds_quantize(model: onnx.ModelProto) -> bool:
    """True when the (float) graph input goes straight into QuantizeLinear nodes only."""
    name = model.graph.input[0].name
    users = [n.op_type for n in model.graph.node if name in n.input]
    return bool(users) and all(u == "QuantizeLinear" for u in users)


def peak_activation_bytes(model: onnx.ModelProto) -> int:
    """Largest single intermediate tensor (bytes), from ONNX shape inference."""
    inferred = onnx.shape_inference.infer_shapes(model)
    sizes = [0]
    for v in inferred.graph.value_info:
        dims = [d.dim_value for d in v.type.tensor_type.shape.dim]
        elem = onnx.helper.tensor_dtype_to_np_dtype(v.type.tensor_type.elem_type).itemsize
        if dims and all(d > 0 for d in dims):
            sizes.append(int(np.prod(dims)) * elem)
    return max(sizes)


def optimized_ops(path: Path, level: str) -> dict[str, int]:
    """Op counts of the graph onnxruntime runs on CPU after optimizing at `level`."""
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "optimized.onnx"
        make_session(path, level, out)
        return op_counts(onnx.load(str(out)))


def check_scenario(scn: Scenario) -> dict:
    """Load, verify and measure the committed files of one scenario; returns a summary."""
    folder = EXAMPLES_DIR / scn.name
    float_path, quant_path = folder / f"{scn.name}_float.onnx", folder / f"{scn.name}.onnx"
    quant = onnx.load(str(quant_path))
    onnx.checker.check_model(quant, full_check=True)
    optimized = {level: optimized_ops(quant_path, level) for level in OPT_LEVELS}
    quant_sess, float_sess = make_session(quant_path), make_session(float_path)
    x, y = scenario_data(scn, "test", scn.n_test)
    samples = np.load(folder / "sample_inputs.npz")
    assert samples["inputs"].shape == (N_SAMPLE_INPUTS, *scn.input_shape)
    assert samples["inputs"].dtype == np.float32
    return {
        "name": scn.name,
        "quant_ops": op_counts(quant),
        "optimized_ops_extended": optimized["extended"],
        "optimized_ops_all": optimized["all"],
        "float_ops": op_counts(onnx.load(str(float_path))),
        "inputs": tensor_shapes(quant.graph.input),
        "outputs": tensor_shapes(quant.graph.output),
        "input_elem_type": onnx.TensorProto.DataType.Name(
            quant.graph.input[0].type.tensor_type.elem_type
        ),
        "input_feeds_quantize": input_feeds_quantize(quant),
        "unused_nodes": unused_nodes(quant),
        "initializers": [t.name for t in quant.graph.initializer],
        "quant_weight_bytes": weight_bytes(quant),
        "float_weight_bytes": weight_bytes(onnx.load(str(float_path))),
        "peak_float_activation_bytes": peak_activation_bytes(onnx.load(str(float_path))),
        "float_accuracy": accuracy(float_sess, x, y),
        "quant_accuracy": accuracy(quant_sess, x, y),
        "n_test": scn.n_test,
        "sample_labels": samples["labels"].tolist(),
    }


def _ops_line(counts: dict[str, int]) -> str:
    return ", ".join(f"{op} x{n}" for op, n in counts.items())


def _readme_sections(scn: Scenario, summary: dict) -> list[str]:
    (in_name, in_shape), = summary["inputs"].items()
    (out_name, out_shape), = summary["outputs"].items()
    meaning = "class probabilities" if scn.output_name == "probs" else "class scores (logits)"
    after_input = "QuantizeLinear" if summary["input_feeds_quantize"] else "not only QuantizeLinear"
    classes = "\n".join(f"| {i} | {c} |" for i, c in enumerate(scn.classes))
    dead = summary["unused_nodes"]
    dead_note = (
        f"\n\nThe quantized graph keeps {len(dead)} node(s) whose outputs nothing reads: "
        f"{_ops_line(dict(collections.Counter(dead)))}." if dead else ""
    )
    return [
        f"# {scn.name}\n\n{scn.description}\n\n"
        "Made by `examples/make_examples.py` (synthetic data, fixed seeds); see its docstring.",
        f"## Files\n\n- `{scn.name}.onnx`: the quantized model.\n"
        f"- `{scn.name}_float.onnx`: the float export it was quantized from (opset 17).\n"
        f"- `sample_inputs.npz`: `inputs`, float32 {[N_SAMPLE_INPUTS, *scn.input_shape]}, "
        "generated windows exactly as the model takes them; `labels`, their int64 class ids.",
        f"## Shapes\n\n- input `{in_name}`: float32 {in_shape}, read by {after_input}\n"
        f"- output `{out_name}`: float32 {out_shape}, {meaning}; argmax is the class\n"
        f"- initializers: {summary['quant_weight_bytes']} bytes quantized "
        f"({summary['float_weight_bytes']} bytes in the float model); largest float "
        f"intermediate tensor {summary['peak_float_activation_bytes']} bytes",
        f"## Classes\n\n| id | class |\n|----|-------|\n{classes}",
        f"## Quantization\n\n{scn.quant_note}\n\n"
        f"- float graph: {_ops_line(summary['float_ops'])}\n"
        f"- quantized graph: {_ops_line(summary['quant_ops'])}\n"
        "- as onnxruntime runs it on CPU after ORT_ENABLE_EXTENDED optimization: "
        f"{_ops_line(summary['optimized_ops_extended'])}\n"
        f"- after ORT_ENABLE_ALL: {_ops_line(summary['optimized_ops_all'])}{dead_note}",
        f"## Accuracy on {summary['n_test']} generated test inputs (onnxruntime, CPU)\n\n"
        "| model | accuracy |\n|-------|----------|\n"
        f"| float | {summary['float_accuracy']:.3f} |\n"
        f"| quantized | {summary['quant_accuracy']:.3f} |",
    ]


def write_readme(scn: Scenario, summary: dict) -> None:
    """Describe the scenario, shapes, classes, quantization and measured results."""
    text = "\n\n".join(_readme_sections(scn, summary)) + "\n"
    (EXAMPLES_DIR / scn.name / "README.md").write_text(text)


def build_scenario(scn: Scenario) -> None:
    folder = EXAMPLES_DIR / scn.name
    folder.mkdir(exist_ok=True)
    float_path, quant_path = folder / f"{scn.name}_float.onnx", folder / f"{scn.name}.onnx"
    model = train(scn)
    export_float(scn, model, float_path)
    quantize(scn, float_path, quant_path)
    write_sample_inputs(scn, folder)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("names", nargs="*", help="scenarios to build (default: all)")
    parser.add_argument("--check", action="store_true", help="only check the committed files")
    args = parser.parse_args(argv)
    torch.set_num_threads(1)  # determinism, and the build machine is shared
    chosen = [s for s in SCENARIOS if not args.names or s.name in args.names]
    for scn in chosen:
        if not args.check:
            build_scenario(scn)
        summary = check_scenario(scn)
        if not args.check:
            write_readme(scn, summary)
        print(json.dumps(summary, indent=1))


if __name__ == "__main__":
    main()
