"""Colour maps and PNG encoding for the figures drawn without matplotlib.

The report's maps are SVG written by :mod:`analogs.presentation.svg_maps`; their
colour-filled fields are small PNG images at the grid's resolution, colour-mapped here
through lookup tables and encoded by :func:`encode_png` (zlib and struct: the PNG
specification's signature, IHDR, IDAT and IEND chunks, filter type 0 on every row).

The tables are matplotlib's colour maps sampled at their 256 entries, as hex (the
values matplotlib's ``to_hex`` gives each entry; ``tests/test_svg_maps.py`` compares
every entry with ``matplotlib.colormaps``): ``viridis`` / ``cividis`` (perceptually
uniform) for amounts and probabilities, ``RdBu_r`` only for departures, ``plasma`` for
the kinds of events.
"""

from __future__ import annotations

import struct
import zlib
from functools import cache

import numpy as np

#: zlib level of the PNG images (speed first: the images are a few kB).
PNG_COMPRESS_LEVEL = 6

_TABLES = {
    "viridis": (
        "44015444025645045745055946075a46085c460a5d460b5e470d60470e61471063471164471365481467"
        "48166848176948186a481a6c481b6d481c6e481d6f481f70482071482173482374482475482576482677"
        "482878482979472a7a472c7a472d7b472e7c472f7d46307e46327e46337f463480453581453781453882"
        "443983443a83443b84433d84433e85423f854240864241864142874144874045884046883f47883f4889"
        "3e49893e4a893e4c8a3d4d8a3d4e8a3c4f8a3c508b3b518b3b528b3a538b3a548c39558c39568c38588c"
        "38598c375a8c375b8d365c8d365d8d355e8d355f8d34608d34618d33628d33638d32648e32658e31668e"
        "31678e31688e30698e306a8e2f6b8e2f6c8e2e6d8e2e6e8e2e6f8e2d708e2d718e2c718e2c728e2c738e"
        "2b748e2b758e2a768e2a778e2a788e29798e297a8e297b8e287c8e287d8e277e8e277f8e27808e26818e"
        "26828e26828e25838e25848e25858e24868e24878e23888e23898e238a8d228b8d228c8d228d8d218e8d"
        "218f8d21908d21918c20928c20928c20938c1f948c1f958b1f968b1f978b1f988b1f998a1f9a8a1e9b8a"
        "1e9c891e9d891f9e891f9f881fa0881fa1881fa1871fa28720a38620a48621a58521a68522a78522a884"
        "23a98324aa8325ab8225ac8226ad8127ad8128ae8029af7f2ab07f2cb17e2db27d2eb37c2fb47c31b57b"
        "32b67a34b67935b77937b87838b9773aba763bbb753dbc743fbc7340bd7242be7144bf7046c06f48c16e"
        "4ac16d4cc26c4ec36b50c46a52c56954c56856c66758c7655ac8645cc8635ec96260ca6063cb5f65cb5e"
        "67cc5c69cd5b6ccd5a6ece5870cf5773d05675d05477d1537ad1517cd2507fd34e81d34d84d44b86d549"
        "89d5488bd6468ed64590d74393d74195d84098d83e9bd93c9dd93ba0da39a2da37a5db36a8db34aadc32"
        "addc30b0dd2fb2dd2db5de2bb8de29bade28bddf26c0df25c2df23c5e021c8e020cae11fcde11dd0e11c"
        "d2e21bd5e21ad8e219dae319dde318dfe318e2e418e5e419e7e419eae51aece51befe51cf1e51df4e61e"
        "f6e620f8e621fbe723fde725"
    ),
    "cividis": (
        "00224e00234f00245100255300255400265600275800285900285b00295d002a5f002a61002b62002c64"
        "002c66002d68002e6a002e6c002f6d00306f0030700031700031710132710533710833700c34700f3570"
        "12357014367016377018376f1a386f1c396f1e3a6f203a6f213b6e233c6e243c6e263d6e273e6e293f6e"
        "2a3f6d2b406d2d416d2e416d2f426d31436d32436d33446d34456c35456c36466c38476c39486c3a486c"
        "3b496c3c4a6c3d4a6c3e4b6c3f4c6c404c6c414d6c424e6c434e6c444f6c45506c46516c47516c48526c"
        "49536c4a536c4b546c4c556c4d556c4e566c4f576c50576c51586d52596d535a6d545a6d555b6d555c6d"
        "565c6d575d6d585e6d595e6e5a5f6e5b606e5c616e5d616e5e626e5e636f5f636f60646f61656f62656f"
        "636670646770656870656870666970676a71686a71696b716a6c716b6d726c6d726c6e726d6f726e6f73"
        "6f70737071737172747272747273747374757474757575757676767777767777777878777979777a7a78"
        "7b7a787c7b787d7c787e7c787e7d787f7e78807f78817f78828079838179848279858279868379878478"
        "8885788985788a86788b87788c88788d88788e89788f8a78908b78918b78928c78928d78938e78948e77"
        "958f779690779791779892779992779a93769b94769c95769d95769e96769f9775a09875a19975a29975"
        "a39a74a49b74a59c74a69c74a79d73a89e73a99f73aaa073aba072aca172ada272aea371afa471b0a571"
        "b1a570b3a670b4a76fb5a86fb6a96fb7a96eb8aa6eb9ab6dbaac6dbbad6dbcae6cbdae6cbeaf6bbfb06b"
        "c0b16ac1b26ac2b369c3b369c4b468c5b568c6b667c7b767c8b866c9b965cbb965ccba64cdbb63cebc63"
        "cfbd62d0be62d1bf61d2c060d3c05fd4c15fd5c25ed6c35dd7c45cd9c55cdac65bdbc75adcc859ddc858"
        "dec958dfca57e0cb56e1cc55e2cd54e4ce53e5cf52e6d051e7d150e8d24fe9d34eead34cebd44bedd54a"
        "eed649efd748f0d846f1d945f2da44f3db42f5dc41f6dd3ff7de3ef8df3cf9e03afbe138fce236fde334"
        "fee434fee535fee636fee838"
    ),
    "plasma": (
        "0d088710078813078916078a19068c1b068d1d068e20068f2206902406912605912805922a05932c0594"
        "2e05952f059631059733059735049837049938049a3a049a3c049b3e049c3f049c41049d43039e44039e"
        "46039f48039f4903a04b03a14c02a14e02a25002a25102a35302a35502a45601a45801a45901a55b01a5"
        "5c01a65e01a66001a66100a76300a76400a76600a76700a86900a86a00a86c00a86e00a86f00a87100a8"
        "7201a87401a87501a87701a87801a87a02a87b02a87d03a87e03a88004a88104a78305a78405a78606a6"
        "8707a68808a68a09a58b0aa58d0ba58e0ca48f0da4910ea3920fa39410a29511a19613a19814a099159f"
        "9a169f9c179e9d189d9e199da01a9ca11b9ba21d9aa31e9aa51f99a62098a72197a82296aa2395ab2494"
        "ac2694ad2793ae2892b02991b12a90b22b8fb32c8eb42e8db52f8cb6308bb7318ab83289ba3388bb3488"
        "bc3587bd3786be3885bf3984c03a83c13b82c23c81c33d80c43e7fc5407ec6417dc7427cc8437bc9447a"
        "ca457acb4679cc4778cc4977cd4a76ce4b75cf4c74d04d73d14e72d24f71d35171d45270d5536fd5546e"
        "d6556dd7566cd8576bd9586ada5a6ada5b69db5c68dc5d67dd5e66de5f65de6164df6263e06363e16462"
        "e26561e26660e3685fe4695ee56a5de56b5de66c5ce76e5be76f5ae87059e97158e97257ea7457eb7556"
        "eb7655ec7754ed7953ed7a52ee7b51ef7c51ef7e50f07f4ff0804ef1814df1834cf2844bf3854bf3874a"
        "f48849f48948f58b47f58c46f68d45f68f44f79044f79143f79342f89441f89540f9973ff9983ef99a3e"
        "fa9b3dfa9c3cfa9e3bfb9f3afba139fba238fca338fca537fca636fca835fca934fdab33fdac33fdae32"
        "fdaf31fdb130fdb22ffdb42ffdb52efeb72dfeb82cfeba2cfebb2bfebd2afebe2afec029fdc229fdc328"
        "fdc527fdc627fdc827fdca26fdcb26fccd25fcce25fcd025fcd225fbd324fbd524fbd724fad824fada24"
        "f9dc24f9dd25f8df25f8e125f7e225f7e425f6e626f6e826f5e926f5eb27f4ed27f3ee27f3f027f2f227"
        "f1f426f1f525f0f724f0f921"
    ),
    "RdBu_r": (
        "05306106326407346708366a09386d0a3b700c3d730d3f760e41790f437b10457e114781124984134c87"
        "144e8a15508d1752901854931956961a58991b5a9c1c5c9f1d5fa21e61a51f63a82065ab2267ac2369ad"
        "246aae266caf276eb02870b12a71b22b73b32c75b42e77b52f79b5307ab6327cb7337eb83480b93681ba"
        "3783bb3885bc3a87bd3b88be3c8abe3e8cbf3f8ec0408fc14291c24393c34695c44997c54c99c64f9bc7"
        "529dc8569fc959a1ca5ca3cb5fa5cd62a7ce65a9cf68abd06bacd16eaed271b0d375b2d478b4d57bb6d6"
        "7eb8d781bad884bcd987beda8ac0db8dc2dc90c4dd93c6de96c7df98c8e09bc9e09dcbe1a0cce2a2cde3"
        "a5cee3a7d0e4a9d1e5acd2e5aed3e6b1d5e7b3d6e8b6d7e8b8d8e9bbdaeabddbeac0dcebc2ddecc5dfec"
        "c7e0edcae1eecce2efcfe4efd1e5f0d2e6f0d4e6f1d5e7f1d7e8f1d8e9f1dae9f2dbeaf2ddebf2deebf2"
        "e0ecf3e1edf3e3edf3e4eef4e6eff4e7f0f4e9f0f4eaf1f5ecf2f5edf2f5eff3f5f0f4f6f2f5f6f3f5f6"
        "f5f6f7f6f7f7f7f6f6f7f5f4f8f4f2f8f3f0f8f2eff8f1edf9f0ebf9efe9f9eee7f9ede5f9ebe3faeae1"
        "fae9dffae8defae7dcfbe6dafbe5d8fbe4d6fbe3d4fce2d2fce0d0fcdfcffcdecdfdddcbfddcc9fddbc7"
        "fdd9c4fcd7c2fcd5bffcd3bcfbd0b9fbceb7fbccb4facab1fac8aff9c6acf9c4a9f9c2a7f8bfa4f8bda1"
        "f8bb9ef7b99cf7b799f7b596f6b394f6b191f6af8ef5ac8bf5aa89f5a886f4a683f3a481f2a17ff19e7d"
        "f09c7bef9979ee9677ec9374eb9172ea8e70e98b6ee8896ce6866ae58368e48066e37e64e27b62e17860"
        "df765ede735cdd7059dc6e57db6b55da6853d86551d7634fd6604dd55d4cd35a4ad25849d05548cf5246"
        "ce4f45cc4c44cb4942c94741c84440c6413ec53e3dc43b3cc2383ac13639bf3338be3036bd2d35bb2a34"
        "ba2832b82531b72230b61f2eb41c2db3192cb1182bae172aab162aa81529a51429a213289f12289c1127"
        "991027960f27930e26900d268d0c258a0b25870a248409248108237f08237c0722790622760521730421"
        "7003206d02206a011f67001f"
    ),
}


@cache
def colour_table(name: str) -> np.ndarray:
    """The 256 colours of colour map ``name`` as a (256, 3) uint8 array."""
    text = "".join(_TABLES[name])
    return np.frombuffer(bytes.fromhex(text), dtype=np.uint8).reshape(256, 3)


def colour_hex(name: str, fraction: float) -> str:
    """The colour at ``fraction`` (0..1) of colour map ``name`` as ``#rrggbb`` (the entry
    matplotlib's colour map picks for that float: ``int(fraction * 256)``, clipped)."""
    index = min(max(int(fraction * 256), 0), 255)
    return "#" + colour_table(name)[index].tobytes().hex()


def kind_colour(index: int, n_kinds: int) -> str:
    """Colour of the ``index``-th of ``n_kinds`` event kinds (plasma, away from its
    darkest and lightest ends so that black-edged markers show on white)."""
    return colour_hex("plasma", 0.15 + 0.7 * index / max(n_kinds - 1, 1))


def mapped_rgba(values, name: str, vmin: float, vmax: float, *, bins=None,
                transparent=None) -> np.ndarray:
    """(ny, nx, 4) uint8 colours of ``values`` on colour map ``name``.

    Linear from ``vmin`` to ``vmax`` (outside: the end colours), the entry chosen as
    matplotlib's Normalize and colour map choose it; or with ``bins`` (n + 1 ascending
    edges), each bin one colour spread over the table as matplotlib's BoundaryNorm
    spreads them. NaN and the cells where ``transparent`` is True are fully transparent."""
    values = np.asarray(values, dtype=float)
    missing = ~np.isfinite(values)
    if transparent is not None:
        missing |= np.asarray(transparent, dtype=bool)
    filled = np.where(missing, vmin, values)
    if bins is None:
        span = (vmax - vmin) or 1.0
        with np.errstate(invalid="ignore"):
            index = np.floor((filled - vmin) / span * 256.0)
    else:
        edges = np.asarray(bins, dtype=float)
        which = np.clip(np.digitize(filled, edges) - 1, 0, len(edges) - 2)
        index = np.floor(which * (255.0 / max(len(edges) - 2, 1)))
    index = np.clip(index, 0, 255).astype(np.intp)
    rgba = np.empty(values.shape + (4,), dtype=np.uint8)
    rgba[..., :3] = colour_table(name)[index]
    rgba[..., 3] = np.where(missing, 0, 255)
    return rgba


def encode_png(rgba) -> bytes:
    """PNG bytes of an (ny, nx, 4) uint8 RGBA image, first row at the top (PNG
    specification, ISO/IEC 15948: 8-bit truecolour with alpha, no interlace)."""
    rgba = np.ascontiguousarray(rgba, dtype=np.uint8)
    height, width = rgba.shape[:2]
    rows = np.zeros((height, 1 + 4 * width), dtype=np.uint8)  # filter byte 0: none
    rows[:, 1:] = rgba.reshape(height, -1)

    def chunk(kind: bytes, data: bytes) -> bytes:
        return (struct.pack(">I", len(data)) + kind + data
                + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))

    header = struct.pack(">IIBBBBB", width, height, 8, 6, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header)
            + chunk(b"IDAT", zlib.compress(rows.tobytes(), PNG_COMPRESS_LEVEL))
            + chunk(b"IEND", b""))
