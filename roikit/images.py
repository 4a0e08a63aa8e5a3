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
  exact output size (through libdeflate, the ``deflate`` package, a regular
  dependency; zlib when it cannot be imported or declines a file; both give
  identical bytes), and views the voxels through the header's offset, data
  type and scaling. Uncompressed ``.nii`` files are memory-mapped. One volume
  of a 4D ``.nii.gz`` is streamed (ISA-L's gzip reader when the optional
  ``isal`` package is installed, else Python's).
"""

from __future__ import annotations

import ctypes
import gzip
import io
import os
import struct
import threading
import zlib
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np

from .errors import GridMismatchError, ImageFormatError, InputFileError, RoikitError, UsageError

try:  # libdeflate: whole-buffer gzip decompression, 2-3x faster than zlib here (benchmarks/bench_single_core.py)
    import deflate as _deflate
except ImportError:  # pragma: no cover - a regular dependency; zlib (identical bytes) when it is missing
    _deflate = None

try:  # optional streaming gzip reader (the `fast` extra) for 4D files and verify_data; identical output to zlib
    from isal import igzip as _fast_gzip
except ImportError:  # pragma: no cover - depends on the environment
    _fast_gzip = None

__all__ = [
    "Grid",
    "MapHeader",
    "read_header",
    "load_map",
    "read_flat",
    "resample_nearest",
    "check_same_grid",
    "check_overlap",
    "verify_data",
    "read_grid",
    "max_voxels",
    "DEFAULT_ATOL",
    "DEFAULT_MAX_VOXELS",
]

#: Tolerance (mm) when comparing affines; common practice, no source: far below
#: any voxel size in use, far above float32 rounding of header affines.
DEFAULT_ATOL = 1e-3

#: Largest grid (voxels of one 3D volume) roikit will allocate or resample onto, unless the environment variable
#: ``ROIKIT_MAX_VOXELS`` raises it: 2**26 = 67,108,864 voxels, e.g. a whole-brain 0.5 mm grid (about 58 million)
#: fits, and the arrays of one resampling onto it stay near 2.5 GB.
DEFAULT_MAX_VOXELS = 2**26

#: Largest plausible expansion of gzip data. Deflate cannot expand by more than about 1032:1 (RFC 1951: a
#: 258-byte match coded in at least 2 bits; zlib's technical note gives 1032:1); 1100 leaves room for headers.
GZIP_MAX_RATIO = 1100

#: Target voxels per slab when resampling (bounds the index arrays: about 30 bytes per voxel).
_SLAB_VOXELS = 1 << 22

#: Voxel data types roikit reads (numbers; RGB and other compound types are refused).
_NUMERIC_KINDS = "biuf"


def max_voxels() -> int:
    """The voxel limit in force: ``ROIKIT_MAX_VOXELS`` from the environment, else :data:`DEFAULT_MAX_VOXELS`."""
    text = os.environ.get("ROIKIT_MAX_VOXELS")
    if text is None or not text.strip():
        return DEFAULT_MAX_VOXELS
    try:
        value = int(float(text))
    except (ValueError, OverflowError):
        value = 0
    if value < 1:
        raise UsageError(f"ROIKIT_MAX_VOXELS must be a positive whole number of voxels, got {text!r}; "
                         f"unset it for the default ({DEFAULT_MAX_VOXELS})")
    return value


def _shape_text(shape, n_vol: int = 1) -> str:
    return "x".join(str(int(s)) for s in shape) + (f"x{n_vol}" if n_vol > 1 else "")


def _check_budget(path, shape, n_vol: int, dtype: np.dtype, offset: int, compressed: bool) -> None:
    """Refuse, from the header alone, a file whose claimed data cannot be in it or exceed the voxel limit.

    Nothing is allocated here: the bytes the header promises (offset + voxels x volumes x bytes per voxel) are
    compared with the file's size (exactly for ``.nii``; at most :data:`GZIP_MAX_RATIO` times the compressed
    size for ``.nii.gz``), and the voxels of one volume with :func:`max_voxels`.
    """
    if dtype.kind not in _NUMERIC_KINDS or dtype.fields is not None or dtype.itemsize == 0:
        raise ImageFormatError(
            f"{path}: voxel data type {dtype} is not a number type (RGB or compound images are not maps); "
            "save the image with numeric voxels (e.g. float32 for maps, int16 for atlases)"
        )
    if offset < 0:
        raise ImageFormatError(f"{path}: header gives a negative data offset ({offset}); the header is corrupt")
    nvox = 1
    for s in shape:
        nvox *= int(s)
    limit = max_voxels()
    if nvox > limit:
        raise ImageFormatError(
            f"{path}: header claims a grid of {_shape_text(shape)} = {nvox:,} voxels, more than roikit's limit of "
            f"{limit:,} voxels; if the image is genuine, raise the limit with the environment variable "
            f"ROIKIT_MAX_VOXELS={nvox} (else the header is corrupt)"
        )
    needed = int(offset) + nvox * int(n_vol) * dtype.itemsize
    try:
        size = os.path.getsize(path)
    except OSError as exc:
        raise InputFileError(f"{path}: cannot read the file's size ({exc.strerror or exc})") from exc
    if compressed:
        plausible = size * GZIP_MAX_RATIO + 65536
        if needed > plausible:
            raise ImageFormatError(
                f"{path}: header claims {_shape_text(shape, n_vol)} voxels of {dtype} ({needed:,} bytes), but the "
                f"compressed file has only {size:,} bytes (gzip cannot hold more than about {plausible:,}); the file "
                "is truncated or its header is corrupt"
            )
    elif size < needed:
        raise ImageFormatError(
            f"{path}: file has {size:,} bytes but the header claims {_shape_text(shape, n_vol)} voxels of {dtype} "
            f"({needed:,} bytes); the file is truncated or its header is corrupt"
        )


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
        with nib.imageglobals.LoggingOutputSuppressor():  # nibabel's own log lines would break the one-line errors
            img = nib.load(str(path))
    except nib.filebasedimages.ImageFileError as exc:
        raise ImageFormatError(f"{path}: not a NIfTI image ({exc})") from exc
    except PermissionError as exc:
        raise InputFileError(f"{path}: cannot read the file ({exc.strerror}); check its permissions") from None
    except MemoryError:
        raise ImageFormatError(f"{path}: not enough memory to read the image header; the header is corrupt") from None
    except Exception as exc:  # noqa: BLE001 - OSError, EOFError, zlib.error, ValueError, nibabel's header errors
        raise ImageFormatError(f"{path}: cannot read the image header; the file is corrupt or truncated "
                               f"({_reason(exc)})") from None
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
    if min(int(s) for s in shape) < 1:
        raise ImageFormatError(f"{path}: header gives an empty image (shape {tuple(int(s) for s in shape)}); "
                               "the header is corrupt")
    try:
        grid = Grid(shape[:3], affine)
    except UsageError as exc:
        raise ImageFormatError(f"{path}: the header's voxel-to-world affine is unusable ({exc}); check the "
                               "image's voxel sizes (pixdim) and orientation (qform/sform)") from None
    return grid, int(n_vol)


def _spatial(img, path) -> tuple[Grid, int]:
    return _spatial_shape(img.shape, img.affine, path)


def _parse_header_bytes(path: Path):
    """Parse a NIfTI-1/2 header from the first bytes of the file (decompressing only those); None if unsure."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(1 << 16)
    except OSError as exc:
        raise InputFileError(f"{path}: cannot read the file ({exc.strerror or exc}); check that it is readable "
                             "(permissions, a folder given instead of a file)") from None
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
        try:
            shape = header.get_data_shape()
            grid, n_vol = _spatial_shape(shape, header.get_best_affine(), path)
            slope, inter = header.get_slope_inter()
            out = MapHeader(
                path=str(path),
                grid=grid,
                n_volumes=n_vol,
                dtype=np.dtype(header.get_data_dtype()),
                offset=int(header.get_data_offset()),
                slope=1.0 if slope is None else float(slope),
                inter=0.0 if inter is None else float(inter),
                compressed=str(path).endswith(".gz"),
            )
        except RoikitError:
            raise
        except Exception as exc:  # noqa: BLE001 - nibabel raises many kinds on corrupt fields
            raise ImageFormatError(f"{path}: the NIfTI header is corrupt ({_reason(exc)}); re-export the "
                                   "image") from None
    else:
        img = _nib_load(path)
        try:
            grid, n_vol = _spatial(img, path)
            proxy = img.dataobj  # the array proxy knows the true data offset, type and scaling of the file
            image_file = str(img.file_map["image"].filename or path)  # the .img of a .hdr/.img pair
            out = MapHeader(
                path=image_file,
                grid=grid,
                n_volumes=n_vol,
                dtype=np.dtype(proxy.dtype),
                offset=int(proxy.offset),
                slope=float(proxy.slope),
                inter=float(proxy.inter),
                compressed=image_file.endswith(".gz"),
            )
        except RoikitError:
            raise
        except Exception as exc:  # noqa: BLE001 - nibabel raises many kinds on corrupt fields
            raise ImageFormatError(f"{path}: the NIfTI header is corrupt ({_reason(exc)}); re-export the "
                                   "image") from None
    if not (np.isfinite(out.slope) and np.isfinite(out.inter)):
        raise ImageFormatError(f"{path}: the header's scaling (scl_slope {out.slope:g}, scl_inter {out.inter:g}) is "
                               "not finite; the header is corrupt")
    _check_budget(out.path, out.grid.shape, out.n_volumes, out.dtype, out.offset, out.compressed)
    return out


def _reason(exc: BaseException) -> str:
    if isinstance(exc, KeyError):  # nibabel's code tables: an unknown datatype (or intent/xform) code
        return f"unknown code {exc.args[0] if exc.args else '?'} (e.g. in the datatype field)"
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def verify_data(header: MapHeader) -> None:
    """Check that a file holds all the voxel data its header promises, without keeping them in memory.

    ``.nii``: the file's size. ``.nii.gz``: the data are decompressed in a stream of 4 MB pieces and counted
    (memory stays at one piece); a truncated or corrupt file raises :class:`ImageFormatError` naming it.
    Use it before allocating or resampling anything on the grid of a file (:func:`read_grid`).
    """
    needed = header.offset + header.n_volumes * header.grid.n_voxels * header.dtype.itemsize
    path = header.path
    if not header.compressed:
        size = os.path.getsize(path)
        if size < needed:
            raise ImageFormatError(f"{path}: file has {size:,} bytes but the header promises {needed:,}; the file "
                                   "is truncated")
        return
    opener = _fast_gzip.open if _fast_gzip is not None else gzip.open
    total = 0
    try:
        with opener(path, "rb") as fh:
            while total < needed:
                piece = fh.read(min(1 << 22, needed - total))
                if not piece:
                    break
                total += len(piece)
    except Exception as exc:  # noqa: BLE001 - zlib.error, EOFError, OSError, BadGzipFile or isal's IsalError
        kind = "truncated" if "truncated" in str(exc) or isinstance(exc, EOFError) else "corrupt"
        raise ImageFormatError(f"{path}: {kind} gzip data, cannot decompress ({_reason(exc)})") from None
    if total < needed:
        raise ImageFormatError(f"{path}: voxel data shorter than the header promises ({total:,} of {needed:,} "
                               "bytes); the file is truncated")


def read_grid(path) -> Grid:
    """The grid of a map whose header passed the budget and whose data were verified complete.

    Regions are realised (and region images resampled) on this grid, so a header that claims a huge grid
    without the data to back it is refused before anything is allocated.
    """
    header = read_header(path)
    verify_data(header)
    return header.grid


def _check_volume(n_vol: int, volume: int | None, path) -> int:
    if volume is None:
        if n_vol > 1:
            raise ImageFormatError(
                f"{path}: a 4D file with {n_vol} volumes; choose one explicitly (volume=0..{n_vol - 1}, "
                "or a `volume` column in the map list)"
            )
        return 0
    try:
        if isinstance(volume, (bool, np.bool_)) or float(volume) != int(float(volume)):
            raise ValueError
        volume = int(float(volume))
    except (TypeError, ValueError, OverflowError):
        raise UsageError(f"{path}: volume must be a whole number (0..{n_vol - 1}), got {volume!r}") from None
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
    read_header(path)  # the same header checks and budget as the fast reader, before nibabel allocates anything
    img = _nib_load(path)
    try:
        grid, n_vol = _spatial(img, path)
    except RoikitError:
        raise
    except Exception as exc:  # noqa: BLE001 - nibabel raises many kinds on corrupt fields
        raise ImageFormatError(f"{path}: the NIfTI header is corrupt ({_reason(exc)}); re-export the image") from None
    v = _check_volume(n_vol, volume, path)
    try:
        if len(img.shape) == 3:
            data = np.asarray(img.get_fdata())
        else:
            data = np.asarray(img.dataobj[..., v], dtype=np.float64)
            data = data.reshape(grid.shape, order="F")
    except MemoryError:
        raise ImageFormatError(f"{path}: not enough memory to load its {_shape_text(grid.shape)} voxels") from None
    except Exception as exc:  # noqa: BLE001 - OSError, EOFError, zlib.error, ValueError, nibabel's own errors
        raise ImageFormatError(f"{path}: cannot read voxel data; the file is corrupt or truncated "
                               f"({_reason(exc)})") from None
    return data, grid


# --------------------------------------------------------------------------------------------------
# Fast reader
# --------------------------------------------------------------------------------------------------


class _LibdeflateCalls:
    """libdeflate's own C functions, called through ctypes, which lets other threads run meanwhile.

    The ``deflate`` package links libdeflate into its extension module and exports its C API; its Python
    functions hold the interpreter lock while they decompress. Called through ctypes, the same code releases
    the lock, so extraction's helper thread decompresses one map while the main thread hashes and summarises
    another. One decompressor per thread (libdeflate's are not shared between threads). ``None`` from
    :meth:`load` (symbols not exported, another platform): the package's Python function is used instead.
    """

    def __init__(self, lib):
        self.alloc = lib.libdeflate_alloc_decompressor
        self.alloc.restype, self.alloc.argtypes = ctypes.c_void_p, []
        self.free = lib.libdeflate_free_decompressor
        self.free.restype, self.free.argtypes = None, [ctypes.c_void_p]
        self.gunzip = lib.libdeflate_gzip_decompress_ex
        self.gunzip.restype = ctypes.c_int
        self.gunzip.argtypes = [ctypes.c_void_p, ctypes.c_char_p, ctypes.c_size_t, ctypes.c_void_p, ctypes.c_size_t,
                                ctypes.POINTER(ctypes.c_size_t), ctypes.POINTER(ctypes.c_size_t)]
        self.local = threading.local()

    @classmethod
    def load(cls):
        try:
            return cls(ctypes.CDLL(_deflate._deflate.__file__))
        except Exception:  # noqa: BLE001 - AttributeError (a symbol or module missing), OSError
            return None

    def __call__(self, raw, size: int):
        """The first gzip member of ``raw`` decompressed into a new buffer of ``size`` bytes, or None."""
        holder = getattr(self.local, "decompressor", None)
        if holder is None:
            holder = self.local.decompressor = _Decompressor(self)
        d = holder.pointer
        if not d:
            return None
        out = np.empty(size, dtype=np.uint8)
        got_in, got_out = ctypes.c_size_t(0), ctypes.c_size_t(0)
        if not isinstance(raw, bytes):
            raw = bytes(raw)
        result = self.gunzip(d, raw, len(raw), out.ctypes.data, size, ctypes.byref(got_in), ctypes.byref(got_out))
        if result != 0:  # 1 bad data, 2 short output, 3 insufficient space: zlib decides
            return None
        return memoryview(out)[: got_out.value]


class _Decompressor:
    """One thread's libdeflate decompressor, freed with the thread's local data."""

    def __init__(self, calls: _LibdeflateCalls):
        self.free = calls.free
        self.pointer = calls.alloc()

    def __del__(self):
        if self.pointer:
            self.free(self.pointer)
            self.pointer = None


_libdeflate_calls = _LibdeflateCalls.load() if _deflate is not None else None


def _libdeflate(raw, size: int):
    """libdeflate's answer for a gzip buffer (first member, at most ``size`` bytes), or None when it declines."""
    if _deflate is None:
        return None
    if _libdeflate_calls is not None:
        return _libdeflate_calls(raw, size)
    try:
        return _deflate.gzip_decompress(raw, size)
    except Exception:  # noqa: BLE001 - DeflateError or ValueError: zlib decides and words the error
        return None


def _gunzip(raw: bytes, path, needed: int) -> bytes | bytearray | memoryview:
    """Decompress a gzip file's bytes in one call with the exact output size.

    ISIZE, the last 4 bytes of a gzip file, is the uncompressed size modulo 2**32 (RFC 1952,
    section 2.3.1); it sizes the output buffer so the decompressor allocates once, and it is not
    trusted beyond what gzip can hold (:data:`GZIP_MAX_RATIO`). libdeflate (the ``deflate``
    package) decompresses the first gzip member into exactly ISIZE bytes and checks the member's
    CRC-32 and length. Whenever it cannot be used or declines (no ``deflate``; ISIZE smaller than
    the bytes needed: a file above 4 GiB whose ISIZE wrapped around, or several concatenated
    members; corrupt or truncated data), zlib decides: one call, then the member-aware
    decompressor when the first member holds fewer than the ``needed`` bytes, and its message
    for a corrupt file. Both give identical bytes (tests/test_images.py).
    """
    hint = struct.unpack("<I", raw[-4:])[0] if len(raw) >= 18 else 0
    hint = min(hint, len(raw) * GZIP_MAX_RATIO + 65536)  # ISIZE is not trusted beyond what gzip can hold
    if needed <= hint <= 2 * needed + 65536:
        out = _libdeflate(raw, hint)
        if out is not None and len(out) >= needed:
            return out
    try:
        out = zlib.decompress(raw, 31, max(hint, needed, 1))
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
    try:
        arr = _read_voxels(header, v, nvox, dtype, start, stop, raw)
    except RoikitError:
        raise
    except PermissionError as exc:
        raise InputFileError(f"{path}: cannot read the file ({exc.strerror}); check its permissions") from None
    except MemoryError:
        raise ImageFormatError(f"{path}: not enough memory to read its {_shape_text(header.grid.shape)} voxels") \
            from None
    except Exception as exc:  # noqa: BLE001 - numpy/OS errors on a corrupt header or file
        raise ImageFormatError(f"{path}: cannot read voxel data ({_reason(exc)}); the file is corrupt") from None
    if header.slope != 1.0 or header.inter != 0.0:
        arr = arr * header.slope + header.inter
    elif arr.dtype.kind != "f":
        arr = arr.astype(np.float64)
    elif not arr.dtype.isnative:
        arr = arr.astype(arr.dtype.newbyteorder("="))
    return arr


def _read_voxels(header, v, nvox, dtype, start, stop, raw):
    path = header.path
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
    return arr


def _read_gzip_range(path, start: int, stop: int) -> bytes:
    """Decompress only bytes [start, stop) of a gzip file, streaming (flat memory for 4D files).

    Read in pieces of at most 16 MB, so a truncated file never makes roikit allocate what its header claims.
    """
    opener = _fast_gzip.open if _fast_gzip is not None else gzip.open
    pieces = []
    got = 0
    try:
        with opener(path, "rb") as fh:
            fh.seek(start)
            while got < stop - start:
                piece = fh.read(min(1 << 24, stop - start - got))
                if not piece:
                    break
                pieces.append(piece)
                got += len(piece)
    except Exception as exc:  # noqa: BLE001 - zlib.error, OSError, EOFError or isal's IsalError
        raise ImageFormatError(f"{path}: corrupt or truncated gzip data ({_reason(exc)})") from None
    return pieces[0] if len(pieces) == 1 else b"".join(pieces)


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
    limit = max_voxels()
    if target.n_voxels > limit:
        raise UsageError(f"cannot resample onto a grid of {_shape_text(target.shape)} = {target.n_voxels:,} voxels, "
                         f"more than roikit's limit of {limit:,}; raise it with ROIKIT_MAX_VOXELS if the grid is "
                         "genuine")
    m = np.linalg.inv(source.affine) @ target.affine
    out = np.full(target.shape, fill, dtype=data.dtype)
    i = np.arange(target.shape[0], dtype=np.float64)
    j = np.arange(target.shape[1], dtype=np.float64)
    # slabs along k keep the index arrays at about 4 million voxels whatever the size of the target grid
    step = max(1, _SLAB_VOXELS // max(1, target.shape[0] * target.shape[1]))
    for k0 in range(0, target.shape[2], step):
        k = np.arange(k0, min(k0 + step, target.shape[2]), dtype=np.float64)
        idx = []
        for axis in range(3):
            # continuous source index along `axis` = m[axis,0] i + m[axis,1] j + m[axis,2] k + m[axis,3]
            c = (m[axis, 0] * i[:, None, None] + m[axis, 1] * j[None, :, None] + m[axis, 2] * k[None, None, :]
                 + m[axis, 3])
            # round half away from zero would bias; floor(x + 0.5) rounds .5 up consistently (common practice)
            idx.append(np.floor(c + 0.5).astype(np.int64))
        inside = np.ones(idx[0].shape, dtype=bool)
        for axis in range(3):
            inside &= (idx[axis] >= 0) & (idx[axis] < source.shape[axis])
        slab = out[:, :, k0:k0 + len(k)]
        slab[inside] = data[idx[0][inside], idx[1][inside], idx[2][inside]]
    return out
