"""``lodemap map-image``: draw a map file to a PNG."""

from __future__ import annotations

HELP = "draw a map file (field, uncertainty, coverage, graph) to a PNG"


def add_arguments(parser):
    parser.add_argument("map_path", metavar="FLOOR.map", help="map file written by 'lodemap build-map'")
    parser.add_argument("--out", required=True, metavar="PNG", help="output image (written atomically)")
    parser.add_argument("--kind", choices=("field", "quality"), default="field",
                        help="field: b_x, b_y, b_up, |B|, sd, coverage (default); quality: coverage, latent sd, "
                             "localisability and stretches to re-survey")
    parser.add_argument("--dpi", type=int, default=130, metavar="N", help="image resolution, dots per inch (default 130)")


def run(args):
    from fingerprint._atomic import check_writable
    from fingerprint.errors import ConfigError
    from fingerprint.mapfile import load_map

    from ..quality import field_image, quality_image

    if not 1 <= args.dpi <= 1200:  # 1200 dpi: a 7 x 5 inch figure is already 8400 x 6000 pixels
        raise ConfigError(f"--dpi must be an integer from 1 to 1200, got {args.dpi}")
    check_writable(args.out, inputs=[args.map_path])
    fmap = load_map(args.map_path)
    if args.kind == "field":
        field_image(fmap, args.out, dpi=args.dpi)
    else:
        quality_image(fmap, args.out, dpi=args.dpi)
    print(f"wrote {args.out}")
    return 0
