"""Images and grids: reading NIfTI maps, comparing voxel grids, nearest-neighbour resampling.

The first layer of roikit. A :class:`Grid` is a 3D shape plus a 4x4 float64
affine mapping voxel indices (i, j, k) to world millimetres (x, y, z).

Voxel data are kept in the file's order (Fortran order: i varies fastest), and
flat voxel indices everywhere in roikit follow that order, so a whole map can be
viewed as one flat array without a copy.

Two readers share one contract:

* :func:`load_map` goes through nibabel (any NIfTI-1/2 file, 3D or one volume
  of a 4D file) and returns a 3D float array and its grid;
* :func:`read_flat` is the fast path used by extraction: it parses the header
  with nibabel, reads the file's bytes, decompresses gzip in one call with the
  exact output size (through ISA-L when the optional ``isal`` package is
  installed, else zlib; both give identical bytes), and views the voxels
  through the header's offset, data type and scaling. Uncompressed ``.nii``
  files are memory-mapped.
"""

from __future__ import annotations

import gzip
import io
import os
import struct
import zlib
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np

from .errors import GridMismatchError, ImageFormatError, InputFileError, UsageError

try:  # optional accelerated gzip (the `fast` extra); identical output to zlib
    from isal import igzip as _fast_gzip
    from isal import isal_zlib as _fast_zlib
except ImportError:  # pragma: no cover - depends on the environment
    _fast_gzip = _fast_zlib = None

__all__ = [
    "Grid",
    "MapHeader",
    "read_header",
    "load_map",
    "read_flat",
    "resample_nearest",
    "check_same_grid",
    "check_overlap",
    "DEFAULT_ATOL",
]

#: Tolerance (mm) when comparing affines; common practice, no source: far below
#: any voxel size in use, far above float32 rounding of header affines.
DEFAULT_ATOL = 1e-3


@dataclass(frozen=True)
class Grid:
    """A voxel grid: 3D shape and a 4x4 voxel-to-world (mm) affine.

    Parameters
    ----------
    shape : tuple of int
        Number of voxels along i, j, k.
    affine : array (4, 4)
        Voxel (i, j, k, 1) to world (x, y, z, 1) in millimetres.

    Examples
    --------
    >>> g = Grid((91, 109, 91), np.diag([-2.0, 2.0, 2.0, 1.0]) + np.c_[np.zeros((4, 3)), [90, -126, -72, 0]])
    >>> g.voxel_to_world([45, 63, 36]).tolist()
    [0.0, 0.0, 0.0]
    """

    shape: tuple[int, int, int]
    affine: np.ndarray

    def __post_init__(self):
        shape = tuple(int(s) for s in self.shape)
        if len(shape) != 3 or min(shape) < 1:
            raise UsageError(f"grid shape must be three positive integers, got {self.shape}")
        affine = np.asarray(self.affine, dtype=np.float64)
        if affine.shape != (4, 4) or not np.all(np.isfinite(affine)):
            raise UsageError(f"grid affine must be a finite 4x4 array, got shape {affine.shape}")
        if abs(np.linalg.det(affine[:3, :3])) < 1e-12:
            raise UsageError("grid affine is singular (zero voxel size along some axis)")
        affine.setflags(write=False)
        object.__setattr__(self, "shape", shape)
        object.__setattr__(self, "affine", affine)

    @property
    def n_voxels(self) -> int:
        return int(np.prod(self.shape))

    @property
    def voxel_sizes(self) -> np.ndarray:
        """Voxel edge lengths in mm (column norms of the affine)."""
        return np.sqrt((self.affine[:3, :3] ** 2).sum(axis=0))

    @property
    def voxel_volume(self) -> float:
        """Volume of one voxel in mm3 (absolute determinant of the affine's 3x3 part)."""
        a, b, c = self.affine[:3, :3].T  # triple product: exact for axis-aligned affines, unlike an LU determinant
        return float(abs(np.dot(a, np.cross(b, c))))

    def voxel_to_world(self, ijk) -> np.ndarray:
        """World mm of voxel indices, shape (..., 3)."""
        ijk = np.asarray(ijk, dtype=np.float64)
        return ijk @ self.affine[:3, :3].T + self.affine[:3, 3]

    def world_to_voxel(self, xyz) -> np.ndarray:
        """Continuous voxel indices of world mm coordinates, shape (..., 3)."""
        xyz = np.asarray(xyz, dtype=np.float64)
        inv = np.linalg.inv(self.affine)
        return xyz @ inv[:3, :3].T + inv[:3, 3]

    def flat_to_ijk(self, flat) -> np.ndarray:
        """Voxel indices (n, 3) of Fortran-order flat indices."""
        return np.stack(np.unravel_index(np.asarray(flat), self.shape, order="F"), axis=-1)

    def ijk_to_flat(self, ijk) -> np.ndarray:
        ijk = np.asarray(ijk)
        return np.ravel_multi_index((ijk[..., 0], ijk[..., 1], ijk[..., 2]), self.shape, order="F")

    def world_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """Lowest and highest world coordinates covered (voxel centres +- half a voxel)."""
        corners = np.array(
            [[i, j, k] for i in (-0.5, self.shape[0] - 0.5) for j in (-0.5, self.shape[1] - 0.5)
             for k in (-0.5, self.shape[2] - 0.5)]
        )
        world = self.voxel_to_world(corners)
        return world.min(axis=0), world.max(axis=0)

    def matches(self, other: "Grid", *, atol: float = DEFAULT_ATOL) -> bool:
        """Same shape and affines equal within ``atol`` mm."""
        return self.shape == other.shape and bool(np.allclose(self.affine, other.affine, rtol=0, atol=atol))

    def describe(self) -> str:
        """One-line description: shape, voxel size and origin."""
        sizes = ",".join(f"{v:g}" for v in self.voxel_sizes)
        diag = np.round(np.diag(self.affine)[:3], 4)
        return (f"shape {self.shape[0]}x{self.shape[1]}x{self.shape[2]}, voxel {sizes} mm, "
                f"affine diagonal {diag.tolist()}, origin {np.round(self.affine[:3, 3], 4).tolist()}")

    def to_dict(self) -> dict:
        return {"shape": list(self.shape), "affine": self.affine.tolist()}


def check_same_grid(a: Grid, b: Grid, *, a_name: str, b_name: str, atol: float = DEFAULT_ATOL) -> None:
    """Raise :class:`GridMismatchError` naming both files and grids unless they match."""
    if not a.matches(b, atol=atol):
        raise GridMismatchError(
            f"maps are on different grids: {a_name} has {a.describe()}; {b_name} has {b.describe()}; "
            "resample the maps to one grid before extraction"
        )


def check_overlap(source: Grid, target: Grid, *, source_name: str, target_name: str) -> None:
    """Refuse two grids whose world bounding boxes do not overlap (different spaces)."""
    lo1, hi1 = source.world_bounds()
    lo2, hi2 = target.world_bounds()
    if np.any(hi1 <= lo2) or np.any(hi2 <= lo1):
        raise GridMismatchError(
            f"{source_name} and {target_name} do not overlap in world space "
            f"({source_name} spans {np.round(lo1, 1).tolist()} to {np.round(hi1, 1).tolist()} mm, "
            f"{target_name} spans {np.round(lo2, 1).tolist()} to {np.round(hi2, 1).tolist()} mm); "
            "they are probably in different spaces: bring both into the same template space first"
        )


# --------------------------------------------------------------------------------------------------
# Headers and loading through nibabel
# --------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class MapHeader:
    """What the fast reader needs from a NIfTI header."""

    path: str
    grid: Grid
    n_volumes: int
    dtype: np.dtype
    offset: int
    slope: float
    inter: float
    compressed: bool


def _check_file(path) -> Path:
    path = Path(path)
    if not path.is_file():
        where = path.parent if str(path.parent) else Path(".")
        raise InputFileError(f"{path}: file not found (looked in {where.resolve()})")
    return path


def _nib_load(path: Path):
    try:
        img = nib.load(str(path))
    except nib.filebasedimages.ImageFileError as exc:
        raise ImageFormatError(f"{path}: not a NIfTI image ({exc})") from exc
    except (OSError, EOFError, zlib.error, gzip.BadGzipFile, ValueError) as exc:
        raise ImageFormatError(f"{path}: cannot read the image header; the file is corrupt or truncated ({exc})") from exc
    if not isinstance(img, (nib.Nifti1Image, nib.Nifti2Image, nib.Nifti1Pair, nib.Nifti2Pair)):
        raise ImageFormatError(f"{path}: a {type(img).__name__}, not a NIfTI image; convert it to NIfTI (.nii/.nii.gz)")
    return img


def _spatial_shape(shape, affine, path) -> tuple[Grid, int]:
    if len(shape) == 3:
        n_vol = 1
    elif len(shape) == 4:
        n_vol = shape[3]
    elif len(shape) > 4 and all(s == 1 for s in shape[4:]):
        n_vol = shape[3]
    else:
        raise ImageFormatError(f"{path}: image has shape {tuple(shape)}; expected a 3D map or a 4D file of 3D volumes")
    return Grid(shape[:3], affine), int(n_vol)


def _spatial(img, path) -> tuple[Grid, int]:
    return _spatial_shape(img.shape, img.affine, path)


def _parse_header_bytes(path: Path):
    """Parse a NIfTI-1/2 header from the first bytes of the file (decompressing only those); None if unsure."""
    with open(path, "rb") as fh:
        head = fh.read(1 << 16)
    if head[:2] == b"\x1f\x8b":
        try:
            head = zlib.decompressobj(31).decompress(head, 544)
        except zlib.error:
            return None
    if len(head) < 348:
        return None
    for cls, size in ((nib.Nifti1Header, 348), (nib.Nifti2Header, 540)):
        for order in ("<", ">"):
            if struct.unpack(order + "i", head[:4])[0] == size and len(head) >= size:
                try:
                    header = cls.from_fileobj(io.BytesIO(head[:size] + b"\x00" * 4), check=False)
                except Exception:  # noqa: BLE001 - fall back to nibabel's full loader and its message
                    return None
                magic = bytes(header["magic"])
                if magic in (b"n+1", b"n+2") or magic.startswith((b"n+1", b"n+2")):
                    return header
                return None
    return None


def read_header(path) -> MapHeader:
    """Parse a NIfTI header (about 0.1 ms); no voxel data are read.

    Single-file NIfTI-1/2 headers are parsed from the file's first bytes (decompressing only
    those); anything else (pairs of .hdr/.img, unusual files) goes through nibabel's loader.
    """
    path = _check_file(path)
    header = _parse_header_bytes(path)
    if header is not None:
        shape = header.get_data_shape()
        grid, n_vol = _spatial_shape(shape, header.get_best_affine(), path)
        slope, inter = header.get_slope_inter()
        return MapHeader(
            path=str(path),
            grid=grid,
            n_volumes=n_vol,
            dtype=np.dtype(header.get_data_dtype()),
            offset=int(header.get_data_offset()),
            slope=1.0 if slope is None else float(slope),
            inter=0.0 if inter is None else float(inter),
            compressed=str(path).endswith(".gz"),
        )
    img = _nib_load(path)
    grid, n_vol = _spatial(img, path)
    proxy = img.dataobj  # the array proxy knows the true data offset, type and scaling of the file
    image_file = str(img.file_map["image"].filename or path)  # the .img of a .hdr/.img pair
    return MapHeader(
        path=image_file,
        grid=grid,
        n_volumes=n_vol,
        dtype=np.dtype(proxy.dtype),
        offset=int(proxy.offset),
        slope=float(proxy.slope),
        inter=float(proxy.inter),
        compressed=image_file.endswith(".gz"),
    )


def _check_volume(n_vol: int, volume: int | None, path) -> int:
    if volume is None:
        if n_vol > 1:
            raise ImageFormatError(
                f"{path}: a 4D file with {n_vol} volumes; choose one explicitly (volume=0..{n_vol - 1}, "
                "or a `volume` column in the map list)"
            )
        return 0
    volume = int(volume)
    if not 0 <= volume < n_vol:
        raise ImageFormatError(f"{path}: volume {volume} requested, but the file has {n_vol} (0..{n_vol - 1})")
    return volume


def load_map(path, *, volume: int | None = None) -> tuple[np.ndarray, Grid]:
    """Load a 3D map (or one volume of a 4D file) through nibabel.

    Parameters
    ----------
    path : path
        A NIfTI-1 or NIfTI-2 file (``.nii`` or ``.nii.gz``).
    volume : int, optional
        For 4D files, the 0-based volume to read; required when there are several.

    Returns
    -------
    data : ndarray, float64, shape grid.shape
        Scaled voxel values (header slope and intercept applied).
    grid : Grid
    """
    path = _check_file(path)
    img = _nib_load(path)
    grid, n_vol = _spatial(img, path)
    v = _check_volume(n_vol, volume, path)
    try:
        if len(img.shape) == 3:
            data = np.asarray(img.get_fdata())
        else:
            data = np.asarray(img.dataobj[..., v], dtype=np.float64)
            data = data.reshape(grid.shape, order="F")
    except (OSError, EOFError, zlib.error, ValueError) as exc:
        raise ImageFormatError(f"{path}: cannot read voxel data; the file is corrupt or truncated ({exc})") from exc
    return data, grid


# --------------------------------------------------------------------------------------------------
# Fast reader
# --------------------------------------------------------------------------------------------------


def _gunzip(raw: bytes, path, needed: int) -> bytes:
    """Decompress a gzip file's bytes in one call with the exact output size.

    ISIZE, the last 4 bytes of a gzip file, is the uncompressed size modulo 2**32 (RFC 1952,
    section 2.3.1); it sizes the output buffer so the decompressor allocates once. A one-shot
    decompression reads only the first gzip member; when that gives fewer than the ``needed``
    bytes (a file of several concatenated members), the member-aware decompressor is used.
    ISA-L (optional ``isal`` package) and zlib give identical bytes.
    """
    hint = struct.unpack("<I", raw[-4:])[0] if len(raw) >= 18 else 0
    lib = _fast_zlib if _fast_zlib is not None else zlib
    try:
        out = lib.decompress(raw, 31, max(hint, needed, 1))
        if len(out) < needed:
            out = (_fast_gzip or gzip).decompress(raw)
    except Exception as exc:  # zlib.error, EOFError, OSError, or isal's own IsalError
        kind = "truncated" if "truncated" in str(exc) or isinstance(exc, EOFError) else "corrupt"
        raise ImageFormatError(f"{path}: {kind} gzip data, cannot decompress ({exc})") from exc
    return out


def read_flat(header: MapHeader, *, volume: int | None = None, raw: bytes | None = None) -> np.ndarray:
    """Read one 3D map (or one volume) as a flat float array in the file's (Fortran) order.

    Parameters
    ----------
    header : MapHeader
        From :func:`read_header`.
    volume : int, optional
        Volume of a 4D file (required when it has several).
    raw : bytes, optional
        The file's bytes, if already read (e.g. to hash them).

    Returns
    -------
    ndarray, shape (n_voxels,)
        float32 or float64 (the file's float type; integers become float64), scaled by the
        header's slope and intercept. Read-only when memory-mapped.

    Notes
    -----
    Equal to ``nibabel.load(path).get_fdata().ravel(order="F")`` (checked in the tests, including
    scaled integer files and big-endian files).
    """
    path = header.path
    v = _check_volume(header.n_volumes, volume, path)
    nvox = header.grid.n_voxels
    dtype = header.dtype
    start = header.offset + v * nvox * dtype.itemsize
    stop = start + nvox * dtype.itemsize
    if header.compressed:
        if header.n_volumes > 1:
            # stream only up to the volume needed: memory stays at one volume, not the whole file
            data = _read_gzip_range(path, start, stop)
        else:
            if raw is None:
                with open(path, "rb") as fh:
                    raw = fh.read()
            data = memoryview(_gunzip(raw, path, stop))[start:stop]
        if len(data) < stop - start:
            raise ImageFormatError(
                f"{path}: voxel data shorter than the header promises ({len(data)} of {stop - start} bytes); "
                "the file is truncated"
            )
        arr = np.frombuffer(data, dtype=dtype, count=nvox)
    else:
        size = os.path.getsize(path)
        if size < stop:
            raise ImageFormatError(
                f"{path}: file has {size} bytes but the header promises {stop}; the file is truncated"
            )
        arr = np.memmap(path, dtype=dtype, mode="r", offset=start, shape=(nvox,))
    if header.slope != 1.0 or header.inter != 0.0:
        arr = arr * header.slope + header.inter
    elif arr.dtype.kind != "f":
        arr = arr.astype(np.float64)
    elif not arr.dtype.isnative:
        arr = arr.astype(arr.dtype.newbyteorder("="))
    return arr


def _read_gzip_range(path, start: int, stop: int) -> bytes:
    """Decompress only bytes [start, stop) of a gzip file, streaming (flat memory for 4D files)."""
    opener = _fast_gzip.open if _fast_gzip is not None else gzip.open
    try:
        with opener(path, "rb") as fh:
            fh.seek(start)
            buf = bytearray(stop - start)
            n = fh.readinto(buf)
    except (zlib.error, OSError, EOFError) as exc:
        raise ImageFormatError(f"{path}: corrupt gzip data ({exc})") from exc
    return bytes(buf[:n]) if n < len(buf) else bytes(buf)


# --------------------------------------------------------------------------------------------------
# Resampling
# --------------------------------------------------------------------------------------------------


def resample_nearest(data: np.ndarray, source: Grid, target: Grid, *, fill=0) -> np.ndarray:
    """Nearest-neighbour resampling of a 3D image onto another grid through the two affines.

    Orientation-aware: each target voxel centre is mapped to world mm by the target affine, then
    to the source's continuous voxel indices by the inverse source affine, and rounded. Voxels that
    fall outside the source take ``fill``. Labels are preserved exactly (no interpolation).

    Parameters
    ----------
    data : ndarray, shape source.shape
    source, target : Grid
    fill : scalar
        Value for target voxels outside the source image.

    Returns
    -------
    ndarray, shape target.shape, dtype of ``data``
    """
    data = np.asarray(data)
    if data.shape[:3] != source.shape:
        raise UsageError(f"data shape {data.shape} does not match the source grid {source.shape}")
    # target voxel -> source voxel: inv(A_src) @ A_tgt, computed per axis without a full (n, 3) float array
    m = np.linalg.inv(source.affine) @ target.affine
    out = np.full(target.shape, fill, dtype=data.dtype)
    i = np.arange(target.shape[0], dtype=np.float64)
    j = np.arange(target.shape[1], dtype=np.float64)
    k = np.arange(target.shape[2], dtype=np.float64)
    idx = []
    for axis in range(3):
        # continuous source index along `axis` = m[axis,0] i + m[axis,1] j + m[axis,2] k + m[axis,3]
        c = (m[axis, 0] * i[:, None, None] + m[axis, 1] * j[None, :, None] + m[axis, 2] * k[None, None, :]
             + m[axis, 3])
        # round half away from zero would bias; floor(x + 0.5) rounds .5 up consistently (common practice)
        idx.append(np.floor(c + 0.5).astype(np.int64))
    inside = np.ones(target.shape, dtype=bool)
    for axis in range(3):
        inside &= (idx[axis] >= 0) & (idx[axis] < source.shape[axis])
    out[inside] = data[idx[0][inside], idx[1][inside], idx[2][inside]]
    return out
