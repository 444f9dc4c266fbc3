"""Synthetic overhead photos of a cell, 3D-correct, with ground truth.

How a photo is made (all geometry through one :class:`vision.camera.Camera`):

1. An ideal (distortion-free) pinhole image, the *canvas*, at twice the output resolution and large
   enough to cover what the distorted lens sees. Planes map to the canvas by homographies, so the table
   texture and every marker's paper are warped in exactly; part faces (top face and the visible side
   faces of boxes and cylinders, back faces culled) are filled as projected polygons, far objects first.
   Shading is Lambertian with an ambient term; shadows are the parts' projections along the light onto
   the table, blurred (soft).
2. Lighting on the whole scene: brightness, white-balance gains, a linear gradient and vignetting.
3. The lens: each output pixel (2x2 sub-samples) looks up the canvas at its undistorted position
   (OpenCV's distortion model, inverted with ``cv2.undistortPoints`` on a coarse grid and interpolated),
   then the sub-samples are averaged. So ``Camera.project`` (``cv2.projectPoints``) of a table point
   lands where the renderer drew it.
4. The sensor: sRGB encoding, Gaussian plus signal-dependent noise, 8 bits, JPEG.

Colours are composed in linear RGB; a part's top face under neutral light renders at its class's
CIELAB reference colour.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np
from pydantic import BaseModel

from gripsight.vision.camera import Camera
from gripsight.vision.colour import linear_from_srgb, srgb_from_lab, srgb_from_linear
from gripsight.vision.markergeom import marker_paper_corners_mm
from gripsight.vision.synth.paper import marker_paper
from gripsight.vision.synth.scene import ResolvedPart, Scene, make_camera, resolve_parts
from gripsight.vision.synth.surfaces import BUSY_PX_PER_MM, Surface, busy_texture

__all__ = ["Rendered", "render_scene", "encode_photo"]

_SS = 2                      # supersampling factor
_MAP_STEP = 8                # coarse grid step (fine pixels) of the lens map
_TEXTURE_PX_PER_MM = 2.0
_TABLE_LAB = (74.0, 1.5, 9.0)
_BASE_LAB = (24.0, 0.0, -1.0)
_RISER_LAB = (62.0, 2.0, 6.0)


@dataclass
class Rendered:
    """A rendered photo: 8-bit BGR image, the camera that took it, and its truth record."""

    image_bgr: np.ndarray
    camera: Camera
    truth: dict


# ------------------------------------------------------------------ lens map and canvas
def _lens_map(cam: Camera):
    """Canvas intrinsics and the fine-grid map (2H, 2W) to canvas coordinates."""
    w2, h2 = cam.width_px * _SS, cam.height_px * _SS
    # coarse grid on fine pixels, aligned so that cv2.resize (INTER_LINEAR) reproduces it exactly at the
    # nodes: coarse node k sits at fine coordinate k * step + (step - 1) / 2
    nx, ny = w2 // _MAP_STEP + 1, h2 // _MAP_STEP + 1
    fi = np.arange(nx) * _MAP_STEP + (_MAP_STEP - 1) / 2.0
    fj = np.arange(ny) * _MAP_STEP + (_MAP_STEP - 1) / 2.0
    gu, gv = np.meshgrid((fi - 0.5) / _SS, (fj - 0.5) / _SS)        # output-pixel coordinates of the nodes
    norm = cam.undistort_normalised(np.column_stack([gu.ravel(), gv.ravel()])).reshape(ny, nx, 2)
    full = cv2.resize(norm.astype(np.float32), (nx * _MAP_STEP, ny * _MAP_STEP), interpolation=cv2.INTER_LINEAR)
    full = full[:h2, :w2]
    f = cam.K[0, 0] * _SS
    lo = norm.reshape(-1, 2).min(axis=0) * f
    hi = norm.reshape(-1, 2).max(axis=0) * f
    cx, cy = 3.0 - lo[0], 3.0 - lo[1]
    K_canvas = np.array([[f, 0, cx], [0, f, cy], [0, 0, 1.0]])
    size = (int(np.ceil(hi[0] + cx)) + 4, int(np.ceil(hi[1] + cy)) + 4)     # (width, height)
    map_x = (full[..., 0] * f + cx).astype(np.float32)
    map_y = (full[..., 1] * f + cy).astype(np.float32)
    return K_canvas, size, map_x, map_y


def _plane_homography(cam: Camera, K_canvas: np.ndarray, z_mm: float) -> np.ndarray:
    """H_canvas_from_plane: table points (x, y) on the plane z = z_mm -> canvas pixels."""
    R = cam.R_camera_from_table
    t = -R @ cam.centre_mm
    return K_canvas @ np.column_stack([R[:, 0], R[:, 1], R[:, 2] * z_mm + t])


def _apply_h(H, xy):
    p = np.column_stack([xy, np.ones(len(xy))]) @ H.T
    return p[:, :2] / p[:, 2:3]


def _lab_to_linear(lab) -> np.ndarray:
    return linear_from_srgb(srgb_from_lab(np.asarray(lab, float)))


# ------------------------------------------------------------------ table and markers
def _unit_noise(rng, shape, cells, sigma=None):
    """Smooth noise with unit standard deviation: ``cells`` random values per side, cubic-upsampled."""
    h, w = shape
    if sigma is not None:
        field = cv2.GaussianBlur(rng.normal(size=(h, w)).astype(np.float32), (0, 0), sigmaX=sigma[1], sigmaY=sigma[0])
    else:
        field = cv2.resize(rng.normal(size=(max(2, h // cells), max(2, w // cells))).astype(np.float32), (w, h),
                           interpolation=cv2.INTER_CUBIC)
    return (field - field.mean()) / (field.std() + 1e-9)


def _table_texture(rng: np.random.Generator, shape, base_lab=_TABLE_LAB) -> np.ndarray:
    """Linear-RGB texture of a light plywood bench: slow mottling, grain streaks along x, fine speckle.

    Rows of the texture run along table x, so the grain runs along x (up the photo)."""
    low = _unit_noise(rng, shape, 96)
    mid = _unit_noise(rng, shape, 20)
    grain = _unit_noise(rng, shape, 0, sigma=(12.0, 0.8))
    speck = rng.normal(size=shape).astype(np.float32)
    L = base_lab[0] + 2.5 * low + 1.0 * mid + 2.2 * grain + 0.8 * speck
    a = base_lab[1] + 0.6 * low + 0.3 * grain
    b = base_lab[2] + 1.5 * low + 1.0 * grain
    return _lab_to_linear(np.stack([L, a, b], axis=-1)).astype(np.float32)


def _paper_image(cell, marker_id: int, px_per_mm: float):
    """The cell's marker ``marker_id`` on its paper at ``px_per_mm`` (:func:`paper.marker_paper`)."""
    return marker_paper(cell.markers.dictionary, marker_id, cell.markers.size_mm, cell.markers.margin_mm, px_per_mm)


def _warp_into(canvas, image, H_canvas_from_image, corners_canvas):
    """Warp an image into the canvas region covered by its corners, blending with an alpha of its extent."""
    hc, wc = canvas.shape[:2]
    x0 = max(int(np.floor(corners_canvas[:, 0].min())) - 2, 0)
    y0 = max(int(np.floor(corners_canvas[:, 1].min())) - 2, 0)
    x1 = min(int(np.ceil(corners_canvas[:, 0].max())) + 3, wc)
    y1 = min(int(np.ceil(corners_canvas[:, 1].max())) + 3, hc)
    if x1 <= x0 or y1 <= y0:
        return
    T = np.array([[1, 0, -x0], [0, 1, -y0], [0, 0, 1.0]]) @ H_canvas_from_image
    size = (x1 - x0, y1 - y0)
    warped = cv2.warpPerspective(image, T, size, flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT)
    alpha = cv2.warpPerspective(np.ones(image.shape[:2], np.float32), T, size, flags=cv2.INTER_LINEAR,
                                borderMode=cv2.BORDER_CONSTANT)[..., None]
    roi = canvas[y0:y1, x0:x1]
    roi[...] = roi * (1 - alpha) + warped * alpha


def _draw_marker(canvas, cam, K_canvas, cell, marker_id, placement):
    depth = float(cam.to_camera([[placement.x, placement.y, placement.z]])[0, 2])
    density = K_canvas[0, 0] / max(depth, 1.0)                 # canvas pixels per mm on the marker
    paper, n = _paper_image(cell, marker_id, 1.25 * density)
    h = cell.markers.size_mm / 2 + cell.markers.margin_mm
    res = n / (2 * h)                                          # actual paper pixels per mm
    yaw = np.radians(placement.yaw_deg)
    rot = np.array([[np.cos(yaw), -np.sin(yaw)], [np.sin(yaw), np.cos(yaw)]])
    # paper pixel (col, row) -> marker-local (x, y): image down = -x, image right = -y
    A_local = np.array([[0.0, -1 / res, h - 0.5 / res], [-1 / res, 0.0, h - 0.5 / res], [0, 0, 1.0]])
    A_table = np.eye(3)
    A_table[:2, :2] = rot
    A_table[:2, 2] = [placement.x, placement.y]
    H = _plane_homography(cam, K_canvas, placement.z) @ A_table @ A_local
    corners = marker_paper_corners_mm(placement, cell.markers.size_mm, cell.markers.margin_mm)
    _warp_into(canvas, paper, H, _apply_h(_plane_homography(cam, K_canvas, placement.z), corners[:, :2]))


# ------------------------------------------------------------------ solid objects
@dataclass
class _Solid:
    footprint_mm: np.ndarray     # (K, 2) counter-clockwise from above
    z0: float
    z1: float
    albedo: np.ndarray           # linear RGB
    round: bool
    marker: tuple | None = None  # (id, placement) drawn on the top face

    @property
    def centre(self):
        c = self.footprint_mm.mean(axis=0)
        return np.array([c[0], c[1], 0.5 * (self.z0 + self.z1)])


def _shade(normal, light, ambient):
    top = ambient + (1 - ambient) * max(light[2], 0.0)
    return (ambient + (1 - ambient) * max(float(normal @ light), 0.0)) / top


def _poly_to_canvas(cam, K_canvas, pts3):
    uv = cam.project_ideal(pts3, K_canvas)
    return np.round(uv * 8).astype(np.int32)      # fillPoly with shift=3: 1/8 px vertex precision


def _draw_solid(canvas, cam, K_canvas, solid: _Solid, light, ambient, cell):
    fp = solid.footprint_mm
    k = len(fp)
    bottom = np.column_stack([fp, np.full(k, solid.z0)])
    top = np.column_stack([fp, np.full(k, solid.z1)])
    eye = cam.centre_mm
    for i in range(k):
        j = (i + 1) % k
        edge = fp[j] - fp[i]
        normal = np.array([edge[1], -edge[0], 0.0])
        normal /= np.linalg.norm(normal)
        mid = np.array([*(0.5 * (fp[i] + fp[j])), 0.5 * (solid.z0 + solid.z1)])
        if normal @ (eye - mid) <= 0:
            continue
        quad = np.array([bottom[i], bottom[j], top[j], top[i]])
        colour = solid.albedo * _shade(normal, light, ambient)
        cv2.fillPoly(canvas, [_poly_to_canvas(cam, K_canvas, quad)], colour.tolist(), lineType=cv2.LINE_8, shift=3)
    if eye[2] > solid.z1:
        colour = solid.albedo * _shade(np.array([0, 0, 1.0]), light, ambient)
        cv2.fillPoly(canvas, [_poly_to_canvas(cam, K_canvas, top)], colour.tolist(), lineType=cv2.LINE_8, shift=3)
        if solid.marker is not None:
            _draw_marker(canvas, cam, K_canvas, cell, *solid.marker)


def _shadow_mask(shape, cam, K_canvas, solids, light) -> np.ndarray:
    mask = np.zeros(shape, np.float32)
    H0 = _plane_homography(cam, K_canvas, 0.0)
    for s in solids:
        shift = -(s.z1 / max(light[2], 1e-3)) * light[:2]
        pts = np.vstack([s.footprint_mm, s.footprint_mm + shift])
        hull = cv2.convexHull(pts.astype(np.float32)).reshape(-1, 2)
        uv = _apply_h(H0, hull.astype(float))
        cv2.fillPoly(mask, [np.round(uv * 8).astype(np.int32)], 1.0, lineType=cv2.LINE_8, shift=3)
    return mask


def _solids(cell, parts: list[ResolvedPart], base_disc: bool) -> list[_Solid]:
    solids = []
    for p in parts:
        solids.append(_Solid(p.footprint_mm(), 0.0, p.height_mm, _lab_to_linear(p.lab), p.shape == "cylinder"))
    if base_disc:
        t = np.linspace(0, 2 * np.pi, 96, endpoint=False)
        solids.append(_Solid(np.column_stack([45 * np.cos(t), 45 * np.sin(t)]), 0.0, 70.0,
                             _lab_to_linear(_BASE_LAB), True))
    for marker_id, m in cell.markers.layout.items():
        if m.z > 0:
            corners = marker_paper_corners_mm(m, cell.markers.size_mm, cell.markers.margin_mm)[::-1, :2]
            solids.append(_Solid(corners.copy(), 0.0, m.z, _lab_to_linear(_RISER_LAB), False, (marker_id, m)))
    return solids


# ------------------------------------------------------------------ the photo
def _light_direction(lighting) -> np.ndarray:
    az, el = np.radians(lighting.light_azimuth_deg), np.radians(lighting.light_elevation_deg)
    return np.array([np.cos(el) * np.cos(az), np.cos(el) * np.sin(az), np.sin(el)])


def _illumination_field(shape, lighting, cam, K_canvas) -> np.ndarray:
    h, w = shape
    u = (np.arange(w, dtype=np.float32) - K_canvas[0, 2]) / (cam.K[0, 0] * _SS)
    v = (np.arange(h, dtype=np.float32) - K_canvas[1, 2]) / (cam.K[1, 1] * _SS)
    half_w = cam.width_px / (2 * cam.K[0, 0])
    az = np.radians(lighting.gradient_azimuth_deg)
    ramp_u = (np.cos(az) * u / (2 * half_w)).astype(np.float32)
    ramp_v = (np.sin(az) * v / (2 * half_w)).astype(np.float32)
    r2_u, r2_v = (u / half_w) ** 2, (v / half_w) ** 2
    field = 1.0 + lighting.gradient * (ramp_u[None, :] + ramp_v[:, None]) \
        - lighting.vignette * 0.5 * (r2_u[None, :] + r2_v[:, None])
    field = np.clip(field, 0.05, None).astype(np.float32)
    if lighting.spot_radius_mm is not None:
        field *= _spot_field(shape, lighting, cam, K_canvas)
    return field


def _spot_field(shape, lighting, cam, K_canvas) -> np.ndarray:
    """A spot light's falloff on the table: 1 within about its radius of its centre, then down to the
    floor (1 / (1 + (r / radius)^4) between them), from a coarse grid of table points."""
    h, w = shape
    step = 16
    gv, gu = np.mgrid[0:h + step:step, 0:w + step:step].astype(float)
    xy = _apply_h(np.linalg.inv(_plane_homography(cam, K_canvas, 0.0)), np.column_stack([gu.ravel(), gv.ravel()]))
    centre = np.array(lighting.spot_centre_mm if lighting.spot_centre_mm is not None else cam.centre_mm[:2])
    r = np.linalg.norm(xy - centre, axis=1) / lighting.spot_radius_mm
    falloff = lighting.spot_floor + (1 - lighting.spot_floor) / (1 + r ** 4)
    coarse = falloff.reshape(gv.shape).astype(np.float32)
    return cv2.resize(coarse, (coarse.shape[1] * step, coarse.shape[0] * step), interpolation=cv2.INTER_LINEAR)[:h, :w]


def render_scene(cell, scene: Scene) -> Rendered:
    """Render one photo of ``scene`` in ``cell``; returns the 8-bit BGR image, camera and truth."""
    cam = make_camera(scene.camera, cell)
    rng = np.random.default_rng(scene.table_seed)
    parts = resolve_parts(scene, cell)
    K_canvas, (wc, hc), map_x, map_y = _lens_map(cam)
    canvas = _table(cam, K_canvas, (hc, wc), rng, scene.table_lab or _TABLE_LAB, Surface(scene.surface))
    for marker_id, m in cell.markers.layout.items():
        if m.z == 0:
            _draw_marker(canvas, cam, K_canvas, cell, marker_id, m)
    light = _light_direction(scene.lighting)
    solids = _solids(cell, parts, scene.base_disc)
    if scene.lighting.shadow > 0:
        mask = _shadow_mask((hc, wc), cam, K_canvas, solids, light)
        density = cam.K[0, 0] * _SS / max(cam.centre_mm[2], 1.0)
        sigma = max(scene.lighting.shadow_blur_mm * density, 0.5)
        small = cv2.resize(mask, (wc // 4, hc // 4), interpolation=cv2.INTER_AREA)
        small = cv2.GaussianBlur(small, (0, 0), sigma / 4)
        mask = cv2.resize(small, (wc, hc), interpolation=cv2.INTER_LINEAR)
        canvas *= (1.0 - scene.lighting.shadow * mask)[..., None]
    for s in sorted(solids, key=lambda s: -np.linalg.norm(s.centre - cam.centre_mm)):
        _draw_solid(canvas, cam, K_canvas, s, light, scene.lighting.ambient, cell)
    if scene.gripper_marker is not None:
        _draw_gripper(canvas, cam, K_canvas, cell, scene.gripper_marker, light, scene.lighting.ambient)
    gains = np.array(scene.lighting.white_balance, np.float32)[::-1] * scene.lighting.brightness   # BGR order below
    canvas = canvas[..., ::-1] * _illumination_field((hc, wc), scene.lighting, cam, K_canvas)[..., None] * gains
    fine = cv2.remap(np.ascontiguousarray(canvas, dtype=np.float32), map_x, map_y, cv2.INTER_LINEAR,
                     borderMode=cv2.BORDER_REPLICATE)
    linear = cv2.resize(fine, (cam.width_px, cam.height_px), interpolation=cv2.INTER_AREA)
    if scene.sensor.blur_px > 0:
        linear = cv2.GaussianBlur(linear, (0, 0), scene.sensor.blur_px)
    image = _sensor(linear, scene.sensor, rng)
    truth = _truth(cell, scene, cam, parts)
    if scene.gripper_marker is not None:
        truth["gripper_marker"] = _gripper_truth(cam, scene.gripper_marker)
    return Rendered(image, cam, truth)


def _draw_gripper(canvas, cam, K_canvas, cell, spec, light, ambient):
    from gripsight.vision.synth.gripper import draw_gripper_marker, marker_axes

    ex, ey = marker_axes(spec.yaw_deg, spec.pitch_deg)
    draw_gripper_marker(canvas, cam, K_canvas, cell.markers.dictionary, spec, _warp_into,
                        _shade(np.cross(ex, ey), light, ambient))


def _gripper_truth(cam, spec) -> dict:
    from gripsight.vision.synth.gripper import gripper_marker_corners_mm

    corners = gripper_marker_corners_mm(spec)
    return {"id": spec.id, "centre_mm": [float(v) for v in spec.centre_mm],
            "centre_px": cam.project(np.asarray(spec.centre_mm, float)[None])[0].round(4).tolist(),
            "corners_px": cam.project(corners).round(4).tolist(), "in_view": bool(cam.in_view(corners).all())}


def _table(cam, K_canvas, shape, rng, base_lab=_TABLE_LAB, surface: Surface = Surface.PLYWOOD) -> np.ndarray:
    hc, wc = shape
    H0 = _plane_homography(cam, K_canvas, 0.0)
    corners = np.array([[0, 0], [wc, 0], [wc, hc], [0, hc]], float)
    xy = _apply_h(np.linalg.inv(H0), corners)
    x0, y0 = xy.min(axis=0) - 10
    x1, y1 = xy.max(axis=0) + 10
    res = _TEXTURE_PX_PER_MM
    th, tw = int((x1 - x0) * res) + 1, int((y1 - y0) * res) + 1
    texture = _table_texture(rng, (th, tw), base_lab)
    if surface != Surface.PLYWOOD:
        # finer, on its own random stream (drawn from the photo's)
        res = BUSY_PX_PER_MM
        th, tw = int((x1 - x0) * res) + 1, int((y1 - y0) * res) + 1
        plain = cv2.resize(texture, (tw, th), interpolation=cv2.INTER_LINEAR)
        texture = busy_texture(surface, np.random.default_rng(rng.integers(0, 2**63)), (th, tw), plain)
    A = np.array([[0, 1 / res, x0], [1 / res, 0, y0], [0, 0, 1.0]])    # texture (col, row) -> table (x, y)
    return cv2.warpPerspective(texture, H0 @ A, (wc, hc), flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_REFLECT)


def _sensor(linear_bgr, sensor, rng) -> np.ndarray:
    # sRGB encoding through a 4096-entry table (fast, exact to well below one 8-bit level)
    lut = (srgb_from_linear(np.linspace(0, 1, 4096)) * 255.0).astype(np.float32)
    idx = np.clip(linear_bgr * 4095.0, 0, 4095).astype(np.int32)
    img = lut[idx]
    if sensor.noise > 0:
        sigma = np.sqrt(sensor.noise ** 2 + 0.02 * sensor.noise * img)     # read noise + shot-like term
        img = img + rng.standard_normal(img.shape, dtype=np.float32) * sigma
    return np.clip(np.round(img), 0, 255).astype(np.uint8)


def encode_photo(image_bgr: np.ndarray, suffix: str, jpeg_quality: int) -> bytes:
    """Encode as JPEG (``.jpg``/``.jpeg``) or PNG."""
    if suffix.lower() in (".jpg", ".jpeg"):
        ok, buf = cv2.imencode(".jpg", image_bgr, [cv2.IMWRITE_JPEG_QUALITY, int(jpeg_quality)])
    else:
        ok, buf = cv2.imencode(".png", image_bgr)
    if not ok:
        raise RuntimeError(f"OpenCV could not encode a {suffix} image")
    return buf.tobytes()


# ------------------------------------------------------------------ truth
def _truth(cell, scene: Scene, cam: Camera, parts: list[ResolvedPart]) -> dict:
    markers = []
    for marker_id, m in sorted(cell.markers.layout.items()):
        corners = marker_paper_corners_mm(m, cell.markers.size_mm)
        markers.append({"id": int(marker_id), "z_mm": float(m.z),
                        "corners_mm": corners.round(6).tolist(),
                        "corners_px": cam.project(corners).round(4).tolist(),
                        "in_view": bool(cam.in_view(corners).all())})
    truth_parts = []
    for p in parts:
        fp = p.footprint_mm(48)
        solid = np.vstack([np.column_stack([fp, np.zeros(len(fp))]), np.column_stack([fp, np.full(len(fp), p.height_mm)])])
        truth_parts.append({
            "id": p.id, "class": p.class_name, "known_class": p.known, "lab": [round(v, 3) for v in p.lab],
            "shape": p.shape, "size_mm": [p.length_mm, p.width_mm], "height_mm": p.height_mm, "yaw_deg": p.yaw_deg,
            "centre_mm": [round(p.x_mm, 6), round(p.y_mm, 6)],
            "top_centre_px": cam.project([[p.x_mm, p.y_mm, p.height_mm]])[0].round(4).tolist(),
            "in_view": bool(cam.in_view(solid).all())})
    return {"gripsight": "render-truth", "cell": cell.cell,
            "image": {"width_px": cam.width_px, "height_px": cam.height_px},
            "camera": cam.as_dict(),
            "lighting": _record(scene.lighting), "sensor": _record(scene.sensor),
            "table_seed": scene.table_seed, "markers": markers, "parts": truth_parts,
            "scene": _record(scene)}


_LATER_OPTIONS = ("surface", "blur_px", "spot_radius_mm", "spot_centre_mm", "spot_floor", "gripper_marker")


def _record(model) -> dict:
    """A scene or its part as plain data for the truth file; options added later are written only when
    they are not at their defaults, so the truth of a scene that does not use them reads as it always
    did (and the committed sample set stays byte for byte)."""
    record = model.model_dump(by_alias=True, mode="json")
    for key in _LATER_OPTIONS:
        if key in record and getattr(model, key) == type(model).model_fields[key].default:
            record.pop(key)
    for key, value in record.items():
        if isinstance(getattr(model, key, None), BaseModel):
            record[key] = _record(getattr(model, key))
    return record
