"""Small GeoJSON builders for plan tests (plan metres, README "Input files")."""


def feat(kind, coords, gtype="Polygon"):
    """One feature with ``properties.kind``."""
    return {"type": "Feature", "properties": {"kind": kind}, "geometry": {"type": gtype, "coordinates": coords}}


def fc(*features, **extra):
    """A FeatureCollection of ``features`` with extra top-level members."""
    return {"type": "FeatureCollection", "features": list(features), **extra}


def rect(x0, y0, x1, y1):
    """Polygon coordinates of an axis-aligned rectangle."""
    return [[[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]]
