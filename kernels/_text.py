"""Numbers in words for reports: the one place that formats seconds and bytes."""

__all__ = ["format_seconds", "format_bytes"]


def format_seconds(t):
    """``t`` seconds as a short text: ``"85 us"``, ``"32.6 ms"``, ``"1.25 s"``, ``"312 s"``.

    >>> format_seconds(8.5e-5), format_seconds(0.0326), format_seconds(1.25), format_seconds(312.4)
    ('85 us', '32.6 ms', '1.25 s', '312 s')
    """
    if t < 1e-3:
        return f"{t * 1e6:.0f} us"
    if t < 0.1:
        return f"{t * 1e3:.1f} ms"
    return f"{t:.2f} s" if t < 100 else f"{t:.0f} s"


def format_bytes(n):
    """``n`` bytes in binary units: ``"512 B"``, ``"1.5 KiB"``, ``"10.9 GiB"``.

    >>> format_bytes(512), format_bytes(1536), format_bytes(10.9 * 2**30)
    ('512 B', '1.5 KiB', '10.9 GiB')
    """
    for unit in ("B", "KiB", "MiB", "GiB"):
        if n < 1024 or unit == "GiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    raise AssertionError("unreachable")
