#!/usr/bin/python3
"""pngverify.py: an independent PNG check (struct + zlib only, no imaging library).

Usage: pngverify.py FILE [X,Y ...]
Checks the signature, every chunk's CRC-32, the chunk order rules, IHDR, the zlib stream of the
IDAT chunks and the scanline filters (PNG specification, ISO/IEC 15948:2004, sections 5, 9, 11),
then prints:
    size W H
    text KEY VALUE        (one per tEXt / iTXt chunk)
    pixel X Y R G B       (one per requested point, decoded here, not by libpng)
Exits 1 with a message on the first problem.
"""
import struct
import sys
import zlib

SIGNATURE = b"\x89PNG\r\n\x1a\n"


def fail(msg):
    print("error: " + msg)
    sys.exit(1)


def paeth(a, b, c):
    p = a + b - c
    pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
    if pa <= pb and pa <= pc:
        return a
    return b if pb <= pc else c


def main():
    if len(sys.argv) < 2:
        fail("usage: pngverify.py FILE [X,Y ...]")
    data = open(sys.argv[1], "rb").read()
    if data[:8] != SIGNATURE:
        fail("bad signature")
    pos, chunks = 8, []
    while pos < len(data):
        if pos + 12 > len(data):
            fail("truncated chunk header at %d" % pos)
        (length,) = struct.unpack(">I", data[pos:pos + 4])
        ctype = data[pos + 4:pos + 8]
        body = data[pos + 8:pos + 8 + length]
        if len(body) != length or pos + 12 + length > len(data):
            fail("truncated chunk %r" % ctype)
        (crc,) = struct.unpack(">I", data[pos + 8 + length:pos + 12 + length])
        if zlib.crc32(ctype + body) & 0xFFFFFFFF != crc:
            fail("CRC mismatch in chunk %r" % ctype)
        chunks.append((ctype, body))
        pos += 12 + length
        if ctype == b"IEND":
            break
    if pos != len(data):
        fail("data after IEND")
    if not chunks or chunks[0][0] != b"IHDR" or chunks[-1][0] != b"IEND":
        fail("IHDR must come first and IEND last")
    w, h, depth, ctype, comp, filt, interlace = struct.unpack(">IIBBBBB", chunks[0][1])
    if depth != 8 or ctype not in (2, 6) or comp != 0 or filt != 0 or interlace != 0:
        fail("unexpected IHDR: depth %d colour type %d interlace %d" % (depth, ctype, interlace))
    bpp = 3 if ctype == 2 else 4
    idat_idx = [i for i, c in enumerate(chunks) if c[0] == b"IDAT"]
    if not idat_idx or idat_idx != list(range(idat_idx[0], idat_idx[-1] + 1)):
        fail("IDAT chunks missing or not consecutive")
    raw = zlib.decompress(b"".join(chunks[i][1] for i in idat_idx))
    stride = w * bpp
    if len(raw) != h * (stride + 1):
        fail("image data is %d bytes, expected %d" % (len(raw), h * (stride + 1)))
    rows, prev = [], bytearray(stride)
    for y in range(h):
        f = raw[y * (stride + 1)]
        line = bytearray(raw[y * (stride + 1) + 1:(y + 1) * (stride + 1)])
        if f > 4:
            fail("bad filter type %d on row %d" % (f, y))
        for i in range(stride):
            a = line[i - bpp] if i >= bpp else 0
            b = prev[i]
            c = prev[i - bpp] if i >= bpp else 0
            if f == 1:
                line[i] = (line[i] + a) & 0xFF
            elif f == 2:
                line[i] = (line[i] + b) & 0xFF
            elif f == 3:
                line[i] = (line[i] + ((a + b) >> 1)) & 0xFF
            elif f == 4:
                line[i] = (line[i] + paeth(a, b, c)) & 0xFF
        rows.append(line)
        prev = line
    print("size %d %d" % (w, h))
    for ctype_, body in chunks:
        if ctype_ == b"tEXt":
            key, _, value = body.partition(b"\0")
            print("text %s %s" % (key.decode("latin-1"), value.decode("latin-1")))
        elif ctype_ == b"iTXt":
            key, _, rest = body.partition(b"\0")
            flag, method = rest[0], rest[1]
            rest = rest[2:]
            _lang, _, rest = rest.partition(b"\0")
            _tkey, _, value = rest.partition(b"\0")
            if flag:
                value = zlib.decompress(value)
            print("text %s %s" % (key.decode("latin-1"), value.decode("utf-8")))
    for arg in sys.argv[2:]:
        x, y = (int(v) for v in arg.split(","))
        px = rows[y][x * bpp:x * bpp + 3]
        print("pixel %d %d %d %d %d" % (x, y, px[0], px[1], px[2]))


if __name__ == "__main__":
    main()
