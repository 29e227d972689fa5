"""``lodemap simulate SITE_DIR --out DIR``: survey and test walks with exact
truth in a site that describes its steel (e.g. ``demo_building/``).

Output layout (per floor)::

    DIR/<floor>/survey/hh_NNN.log.csv + .checkpoints.csv + .track.csv
    DIR/<floor>/survey_robot/rb_NNN.*      (robot survey, with --platform both, unless --no-robot-survey)
    DIR/<floor>/test/hh_NNN.* and rb_NNN.*
    DIR/<floor>/field_model.npz            (the true field, FieldModel.load)
    DIR/<floor>/truth.json                 (walkers, devices, true lengths)
    DIR/<floor>/simulation.png             (with --plot)
    DIR/simulation.json                    (seed, site, background, counts)
"""

from __future__ import annotations

import math
import time
from pathlib import Path

from . import seed_arg

HELP = "generate survey and test walks with exact truth in a site (e.g. demo_building/)"


def add_arguments(parser):
    parser.add_argument("site_dir", metavar="SITE_DIR", help="folder with site.json and steel.json (or the site.json)")
    parser.add_argument("--out", required=True, metavar="DIR", help="output folder")
    parser.add_argument("--seed", type=seed_arg, default=0, help="seed of the walks (default 0); recorded in every log")
    parser.add_argument("--walks", type=int, default=None, metavar="N",
                        help="test walks per floor and platform (default: 3 handheld, 2 robot, of about 2.5 min each)")
    parser.add_argument("--platform", choices=("handheld", "robot", "both"), default="both",
                        help="platforms to simulate (their survey and test walks): people with phones, robots, or both (default)")
    parser.add_argument("--floors", nargs="+", default=None, metavar="FLOOR", help="only these floors")
    parser.add_argument("--routes", choices=("auto", "file", "plan"), default="auto",
                        help="route graph: the site's <floor>/routes.geojson ('file'), the graph built from the "
                             "plan ('plan'), or the file when there is one ('auto', default)")
    parser.add_argument("--survey-routes", choices=("routes", "plan"), default="routes",
                        help="handheld survey walks pass every corridor and aisle of the route graph twice "
                             "('routes', default), or cover every edge of the graph built from the plan, the one "
                             "a map is built on, lattice over open areas included, in straight lanes ('plan'; "
                             "near steel the field is rougher than the map model can follow, see "
                             "demo_building/README.md)")
    parser.add_argument("--survey-clearance", type=float, default=0.0, metavar="M",
                        help="with --survey-routes plan, the survey must walk only the edges at least M metres "
                             "from the nearest steel dipole (default 0: every edge)")
    parser.add_argument("--no-robot-survey", action="store_true",
                        help="with --platform both, no robot survey (survey_robot/); the robot still makes test walks")
    parser.add_argument("--rate", type=float, default=50.0, metavar="HZ", help="sample rate of the logs (default 50)")
    parser.add_argument("--plot", action="store_true", help="write DIR/<floor>/simulation.png")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")


def _site_file(site_dir):
    p = Path(site_dir)
    return p / "site.json" if p.is_dir() else p


def _route_graph(plan_path, plan, mode):
    from fingerprint.errors import ConfigError

    routes_file = plan_path.parent / "routes.geojson"
    if mode == "file" or (mode == "auto" and routes_file.exists()):
        if not routes_file.exists():
            raise ConfigError(f"--routes file: no route graph at {routes_file}")
        from mapping.graphbuild import load_graph_geojson

        return load_graph_geojson(routes_file, max_edge_m=None), str(routes_file.name)
    try:
        from mapping.graphbuild import build_graph
    except ImportError as err:  # pragma: no cover - graph building not installed
        raise ConfigError(f"no routes.geojson beside {plan_path} and the plan graph builder is missing") from err
    return build_graph(plan), "graph built from the plan"


def run(args):
    import shapely
    from tqdm import tqdm

    from fingerprint._atomic import check_writable, write_json_atomic
    from fingerprint.errors import ConfigError
    from fingerprint.geomag import background_field
    from fingerprint.simulate import DatasetSettings, field_model_for_floor, load_steel, plan_floor, simulate_job
    from fingerprint.simulate.datasets import write_walk
    from mapping.floorplan import load_floor_plan
    from mapping.site import load_site

    started = time.perf_counter()
    site_file = _site_file(args.site_dir)
    site = load_site(site_file)
    steel_file = site_file.parent / "steel.json"
    if not steel_file.exists():
        raise ConfigError(f"simulate needs a steel description at {steel_file} (see demo_building/README.md)")
    steel = load_steel(steel_file)
    if not site.has_location:
        raise ConfigError(
            f"simulate needs latitude_deg, longitude_deg and date in {site_file} for the geomagnetic background"
        )
    rho = float(site.plan_rotation_deg or 0.0)
    geo = background_field(site.latitude_deg, site.longitude_deg, site.date)
    if args.walks is not None and args.walks < 0:
        raise ConfigError(f"--walks must be >= 0, got {args.walks}")
    if not (math.isfinite(args.rate) and 1.0 <= args.rate <= 1000.0):  # a phone logs 50-200 Hz, an IMU up to 1 kHz
        raise ConfigError(f"--rate must be between 1 and 1000 Hz, got {args.rate:g}")
    platforms = ("handheld", "robot") if args.platform == "both" else (args.platform,)
    defaults = DatasetSettings()
    n_hh = defaults.n_test_handheld if args.walks is None else args.walks
    n_rb = defaults.n_test_robot if args.walks is None else args.walks
    settings = DatasetSettings(platforms=platforms, n_test_handheld=n_hh, n_test_robot=n_rb, rate_hz=args.rate,
                               robot_survey=not args.no_robot_survey)
    floors = list(site.floors) if not args.floors else args.floors
    for f in floors:
        site.plan_path(f)  # ConfigError listing the floors
    out = Path(args.out)
    check_writable(out, folder=True)  # before minutes of simulation
    prepared = []
    for floor in floors:
        plan_path = site.floors[floor]
        plan = load_floor_plan(plan_path)
        graph, graph_source = _route_graph(plan_path, plan, args.routes)
        free = plan.free
        shapely.prepare(free)
        fm = field_model_for_floor(steel, floor, geo, plan_rotation_deg=rho)
        fm.meta.update({"site": site.name, "date": site.date.isoformat(), "seed": args.seed})
        fm.save(out / floor / "field_model.npz")
        survey_graph = None
        if args.survey_routes == "plan" and "handheld" in platforms:
            survey_graph = graph if graph_source.startswith("graph built") else _route_graph(plan_path, plan, "plan")[0]
        need = None
        if survey_graph is not None and args.survey_clearance > 0:
            from fingerprint.simulate.datasets import steel_clearance_of_edges

            need = steel_clearance_of_edges(survey_graph, fm) >= args.survey_clearance
        jobs = plan_floor(floor, graph, seed=args.seed, settings=settings, survey_graph=survey_graph,
                          survey_need=need)
        prepared.append((floor, plan, graph, graph_source, free, fm, jobs))
    total = sum(len(p[-1]) for p in prepared)
    bar = tqdm(total=total, desc="simulate", unit="walk", disable=args.no_progress)
    summary = {
        "site": site.name,
        "seed": args.seed,
        "platforms": list(platforms),
        "background": {
            "east_ut": geo.east_ut, "north_ut": geo.north_ut, "up_ut": geo.up_ut,
            "declination_deg": geo.declination_deg, "inclination_deg": geo.inclination_deg,
            "total_ut": geo.total_ut, "model": "IGRF-14 (ppigrf)",
        },
        "plan_rotation_deg": rho,
        "earth_to_plan_rad": math.radians(rho - geo.declination_deg),
        "floors": {},
    }
    lines = []
    for floor, plan, graph, graph_source, free, fm, jobs in prepared:
        truth = {}
        drawn = []
        counts = {}
        for job in jobs:
            bar.set_postfix_str(f"{floor} {job.session}/{job.name}")
            walk = simulate_job(job, floor, fm, graph, free=free, seed=args.seed, settings=settings)
            write_walk(out / floor / walk.session, walk)
            truth[f"{walk.session}/{walk.name}"] = walk.params
            drawn.append((walk.name, walk.session, job.platform, walk.track.xy))
            key = f"{walk.session}:{job.platform}"
            c = counts.setdefault(key, [0, 0.0])
            c[0] += 1
            c[1] += walk.params["duration_s"]
            bar.update(1)
        write_json_atomic(out / floor / "truth.json", {"floor": floor, "seed": args.seed, "walks": truth})
        summary["floors"][floor] = {
            "route_graph": graph_source,
            "n_dipoles": fm.n_dipoles,
            "walks": {k: {"n": v[0], "duration_s": round(v[1], 1)} for k, v in counts.items()},
        }
        if args.plot:
            from mapping.simplot import plot_simulated_floor

            png = plot_simulated_floor(out / floor / "simulation.png", plan=plan, field_model=fm, walks=drawn,
                                       title=f"{site.name}, floor {floor}: simulated |B| and walks (seed {args.seed})")
        desc = ", ".join(f"{v[0]} {k.replace(':', ' ')} ({v[1] / 60:.1f} min)" for k, v in counts.items())
        lines.append(f"floor {floor}: {desc}; {fm.n_dipoles} dipoles; routes from {graph_source}")
        if args.plot:
            lines.append(f"  picture: {png}")
    bar.close()
    summary["elapsed_s"] = round(time.perf_counter() - started, 2)
    write_json_atomic(out / "simulation.json", summary)
    print(f"simulated {total} walks into {out} in {summary['elapsed_s']:.1f} s "
          f"(seed {args.seed}, declination {geo.declination_deg:+.2f}°, |B0| {geo.total_ut:.2f} µT)")
    for line in lines:
        print(line)
    return 0
