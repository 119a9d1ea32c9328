"""Field footprints: exact areas, exact edges, RA = 0 and poles, overlaps, vetoes, unions,
bad field tables."""

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import SkyCoord
from scipy import integrate

from corrpipe.errors import InputError
from corrpipe.survey.field_table import read_field_table
from corrpipe.survey.fields import CIRCLE, RECTANGLE, FieldFootprint, cap_area_sr, rectangle_area_sr
from corrpipe.survey.footprint import BoxFootprint, SkyBox
from corrpipe.survey.unions import FootprintUnion


def isotropic_directions(n, seed):
    """Uniform directions from normalised Gaussian 3-vectors (Muller 1959), in degrees."""
    v = np.random.default_rng(seed).standard_normal((n, 3))
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    return np.degrees(np.arctan2(v[:, 1], v[:, 0])) % 360.0, np.degrees(np.arcsin(v[:, 2]))


def circles(ra, dec, radius_deg, **kw):
    n = np.size(ra)
    return FieldFootprint(np.atleast_1d(ra), np.atleast_1d(dec), np.full(n, CIRCLE), None,
                          None, None, np.broadcast_to(radius_deg, (n,)), **kw)


def rectangles(ra, dec, side_a, side_b, pa=0.0, **kw):
    n = np.size(ra)
    return FieldFootprint(np.atleast_1d(ra), np.atleast_1d(dec), np.full(n, RECTANGLE),
                          np.broadcast_to(side_a, (n,)), np.broadcast_to(side_b, (n,)),
                          np.broadcast_to(pa, (n,)), None, **kw)


def offset_point(ra, dec, pa_deg, sep_deg):
    """Direction at separation ``sep`` and position angle ``pa`` from (ra, dec) (astropy)."""
    p = SkyCoord(ra * u.deg, dec * u.deg).directional_offset_by(pa_deg * u.deg, sep_deg * u.deg)
    return p.ra.deg, p.dec.deg


def edge_point(fp, pa_deg, sep_deg):
    """Direction at exactly ``sep`` from the first field's centre along ``pa``, built from
    unit vectors (cos s c + sin s (cos pa n + sin pa e)) and read back with atan2."""
    g = fp._geometry
    c, n, e = g["centre"][0], g["axis1"][0], g["axis2"][0]
    if fp.shape[0] == RECTANGLE:       # axes of a rectangle are rotated by its PA
        c_pa, s_pa = np.cos(np.radians(fp.position_angle[0])), np.sin(np.radians(fp.position_angle[0]))
        n, e = c_pa * n - s_pa * e, s_pa * n + c_pa * e
    s, p = np.radians(sep_deg), np.radians(pa_deg)
    v = np.cos(s) * c + np.sin(s) * (np.cos(p) * n + np.sin(p) * e)
    return (np.degrees(np.arctan2(v[1], v[0])) % 360,
            np.degrees(np.arctan2(v[2], np.hypot(v[0], v[1]))))


def lhuilier_area(vertices):
    """Area of a convex spherical polygon from its unit-vector vertices: the sum of the
    spherical excesses of a fan of triangles, each by L'Huilier's theorem (Todhunter 1886,
    Spherical Trigonometry, art. 102 [from memory])."""
    total = 0.0
    for k in range(1, len(vertices) - 1):
        a, b, c = vertices[0], vertices[k], vertices[k + 1]
        sa = np.arccos(np.clip(b @ c, -1, 1))
        sb = np.arccos(np.clip(a @ c, -1, 1))
        sc = np.arccos(np.clip(a @ b, -1, 1))
        s = 0.5 * (sa + sb + sc)
        t = np.tan(s / 2) * np.tan((s - sa) / 2) * np.tan((s - sb) / 2) * np.tan((s - sc) / 2)
        total += 4 * np.arctan(np.sqrt(max(t, 0.0)))
    return total


@pytest.mark.parametrize("radius_deg", [1 / 60, 0.5, 10.0, 60.0])
def test_cap_area_against_scipy_integral(radius_deg):
    # solid angle of a cap, ∫_0^r 2 pi sin(theta) dtheta (scipy.integrate.quad reference)
    fp = circles(30.0, 10.0, radius_deg)
    ref, _ = integrate.quad(lambda t: 2 * np.pi * np.sin(t), 0, np.radians(radius_deg),
                            epsabs=0, epsrel=1e-13)
    assert fp.field_areas_sr()[0] == pytest.approx(ref, rel=1e-8)
    assert fp.area_sr() == pytest.approx(ref, rel=1e-8)


@pytest.mark.parametrize("sides", [(1 / 60, 1 / 60), (2.0, 0.5), (30.0, 60.0), (80.0, 80.0)])
def test_rectangle_area_against_gnomonic_integral_and_lhuilier(sides):
    # dOmega = dx dy / (1 + x^2 + y^2)^(3/2) on the tangent plane (gnomonic area element,
    # common practice), integrated with scipy.integrate.dblquad; and L'Huilier's theorem on
    # the four corners (independent of both)
    sa, sb = sides
    fp = rectangles(200.0, -35.0, sa, sb, pa=25.0)
    a, b = np.tan(np.radians(sa) / 2), np.tan(np.radians(sb) / 2)
    ref, _ = integrate.dblquad(lambda y, x: (1 + x * x + y * y) ** -1.5, -a, a, -b, b,
                               epsabs=0, epsrel=1e-12)
    area = fp.field_areas_sr()[0]
    assert area == pytest.approx(ref, rel=1e-8)
    g = fp._geometry
    c, e1, e2 = g["centre"][0], g["axis1"][0], g["axis2"][0]
    corners = [c + sx * a * e1 + sy * b * e2 for sx, sy in ((1, 1), (-1, 1), (-1, -1), (1, -1))]
    corners = [v / np.linalg.norm(v) for v in corners]
    assert area == pytest.approx(lhuilier_area(corners), rel=1e-8)


def test_total_area_against_monte_carlo_count():
    # Monte Carlo: the fraction of isotropic directions inside is area / 4 pi within the
    # binomial error (common practice); fields overlap, cross RA = 0 and reach the poles
    rng = np.random.default_rng(3)
    n = 600
    ra, dec = isotropic_directions(n, 4)
    ra[:20], dec[:10], dec[10:20] = 359.5, 89.0, -88.5
    shape = rng.integers(0, 2, n)
    fp = FieldFootprint(ra, dec, shape, rng.uniform(1, 4, n), rng.uniform(1, 4, n),
                        rng.uniform(0, 180, n), rng.uniform(0.5, 2.5, n))
    assert fp._touched.sum() > 20                # overlaps are present
    pr, pd = isotropic_directions(2_000_000, 5)
    frac = fp.contains(pr, pd).mean()
    sigma = np.hypot(np.sqrt(frac * (1 - frac) / pr.size) * 4 * np.pi, fp.area_error_sr())
    assert abs(frac * 4 * np.pi - fp.area_sr()) < 4 * sigma
    assert fp.area_sr() < fp.field_areas_sr().sum()   # overlaps counted once


def test_circle_edges_are_exact():
    # a point at separation r (astropy directional_offset_by) lies on the edge: inside at
    # r (1 - 1e-9), outside at r (1 + 1e-9); no pixelisation (common practice)
    r = 1.0 / 60
    for ra0, dec0 in ((0.0, 0.0), (359.999, 30.0), (123.0, 89.99), (10.0, -89.995)):
        fp = circles(ra0, dec0, r)
        for pa in (0.0, 77.0, 180.0, 270.0):
            ri, di = offset_point(ra0, dec0, pa, r * (1 - 1e-9))
            ro, do = offset_point(ra0, dec0, pa, r * (1 + 1e-9))
            re, de = edge_point(fp, pa, r)
            assert fp.contains(ri, di)[0], (ra0, dec0, pa)
            assert fp.contains(re, de)[0], (ra0, dec0, pa)   # on the edge: closed field
            assert not fp.contains(ro, do)[0], (ra0, dec0, pa)


def test_rectangle_edges_are_exact_and_position_angle_follows_north_through_east():
    # the middle of an edge is at half the side along the side's position angle
    # (astropy directional_offset_by); PA from north through east (common practice)
    side_a, side_b, pa = 2.0 / 60, 1.0 / 60, 30.0
    for ra0, dec0 in ((0.0, 0.0), (359.995, -12.0), (45.0, 89.97)):
        fp = rectangles(ra0, dec0, side_a, side_b, pa)
        for direction, half in ((pa, side_a / 2), (pa + 180, side_a / 2),
                                (pa + 90, side_b / 2), (pa - 90, side_b / 2)):
            ri, di = offset_point(ra0, dec0, direction, half * (1 - 1e-9))
            ro, do = offset_point(ra0, dec0, direction, half * (1 + 1e-9))
            re, de = edge_point(fp, direction, half)
            assert fp.contains(re, de)[0], (ra0, dec0, direction)
            assert fp.contains(ri, di)[0], (ra0, dec0, direction)
            assert not fp.contains(ro, do)[0], (ra0, dec0, direction)
        # along PA the field reaches side_a/2, across it only side_b/2
        rr, dd = offset_point(ra0, dec0, pa + 90, 0.75 * side_a / 2)
        assert not fp.contains(rr, dd)[0]


def test_fields_across_ra_zero_and_at_the_poles():
    # common practice: RA wraps at 360; a cap around a pole covers every RA near it
    fp = circles([0.0, 0.0, 180.0], [0.0, 89.9, -90.0], [0.5, 0.5, 0.2])
    ra = np.array([359.8, 0.2, 0.0, 90.0, 180.0, 270.0, 0.0, 123.0, 359.0])
    dec = np.array([0.0, 0.0, 89.95, 89.95, 89.95, 89.95, -89.9, -89.85, 1.0])
    assert fp.contains(ra, dec).tolist() == [True] * 8 + [False]
    sq = rectangles(0.0, 90.0, 1.0, 1.0)          # a square centred on the pole
    # its sides run along RA 0/180 and 90/270: 0.45 deg out along a side is inside, 0.55 is
    # not; along the diagonal (RA 45) the corner is 0.707 deg out
    assert sq.contains([0, 90, 180, 270, 0, 45, 45],
                       [89.55, 89.55, 89.55, 89.55, 89.45, 89.4, 89.25]).tolist() == \
        [True, True, True, True, False, True, False]
    pr, pd = isotropic_directions(4_000_000, 9)
    frac = sq.contains(pr, pd).mean()
    assert abs(frac * 4 * np.pi - sq.area_sr()) < 4 * np.sqrt(frac / pr.size) * 4 * np.pi


def test_identical_fields_are_counted_once():
    # an overlap belongs to the field listed first: two copies of a field have one's area
    fp = rectangles([10.0, 10.0], [5.0, 5.0], 0.1, 0.1)
    assert fp.area_sr() == pytest.approx(rectangle_area_sr(np.radians(0.1),
                                                           np.radians(0.1)), rel=1e-12)
    assert fp.owner([10.0], [5.0]).tolist() == [0]


def test_overlapping_circles_union_against_lens_area():
    # two 1-arcmin caps 1 arcmin apart: the overlap is the plane lens
    # 2 r^2 acos(d / 2r) - (d/2) sqrt(4 r^2 - d^2) (plane geometry, common practice; the
    # sphere's curvature changes it by ~r^2 = 1e-7 relative)
    r = np.radians(1 / 60)
    d = r
    lens = 2 * r * r * np.arccos(d / (2 * r)) - 0.5 * d * np.sqrt(4 * r * r - d * d)
    fp = circles([50.0, 50.0 + 1 / 60 / np.cos(np.radians(20.0))], [20.0, 20.0], 1 / 60,
                 overlap_samples=200_000)
    sep = np.radians(SkyCoord([50.0, fp.ra[1]] * u.deg, [20.0, 20.0] * u.deg)[0].separation(
        SkyCoord(fp.ra[1] * u.deg, 20.0 * u.deg)).deg)
    assert sep == pytest.approx(d, rel=1e-4)
    expect = 2 * cap_area_sr(r) - lens
    assert abs(fp.area_sr() - expect) < 4 * fp.area_error_sr() + 1e-3 * lens
    assert fp.area_error_sr() < 0.01 * lens


def test_veto_holes_are_removed():
    # a concentric veto of radius r in a field of radius R leaves cap(R) - cap(r)
    # (closed form of the cap, common practice); directions inside the hole are outside
    hole = circles(100.0, -40.0, 0.2)
    fp = circles(100.0, -40.0, 0.5, vetoes=hole, overlap_samples=200_000)
    expect = cap_area_sr(np.radians(0.5)) - cap_area_sr(np.radians(0.2))
    assert abs(fp.area_sr() - expect) < 4 * fp.area_error_sr()
    assert fp.contains([100.0, 100.0], [-40.0, -40.35]).tolist() == [False, True]
    ra, dec = fp.sample(20_000, np.random.default_rng(1))
    assert fp.contains(ra, dec).all() and not hole.contains(ra, dec).any()


def test_union_with_box_footprint_counts_overlap_once():
    # union area = box + fields outside it (fields inside the box add nothing); box areas are
    # exact (zone formula, common practice), field areas by the closed forms above
    box = BoxFootprint((SkyBox(10, 20, -5, 5),))
    fields = circles([15.0, 40.0, 60.0], [0.0, 0.0, 10.0], 0.5)
    union = FootprintUnion((box, fields), area_samples=400_000)
    expect = box.area_sr() + 2 * cap_area_sr(np.radians(0.5))
    assert abs(union.area_sr() - expect) < 4 * union.area_error_sr() + 1e-12
    assert union.contains([15.0, 40.0, 30.0], [4.0, 0.2, 0.0]).tolist() == [True, True, False]
    ra, dec = union.sample(50_000, np.random.default_rng(2))
    assert union.contains(ra, dec).all()
    # density is uniform: the share of points in the two outside fields matches their area
    share = fields.contains(ra, dec).mean() - np.mean(box.contains(ra, dec)
                                                      & fields.contains(ra, dec))
    expect_share = 2 * cap_area_sr(np.radians(0.5)) / expect
    assert abs(share - expect_share) < 4 * np.sqrt(expect_share / ra.size)


def _write_csv(path, header, rows):
    path.write_text(",".join(header) + "\n" + "\n".join(",".join(map(str, r)) for r in rows))
    return path


def test_field_table_reader_shapes_units_and_columns(tmp_path):
    # arcmin sizes: a 1-arcmin square has area (1/60 deg)^2 to 1e-8 (small-field limit of the
    # pyramid formula, common practice)
    path = _write_csv(tmp_path / "f.csv", ["RA", "Dec", "shape", "side", "radius",
                                           "completeness", "depth_class"],
                      [[10, 0, "square", 1.0, "", 0.8, 0], [11, 0, "circle", "", 0.5, 1.0, 1]])
    fp = read_field_table(path, size_unit="arcmin")
    areas = fp.field_areas_sr()
    assert areas[0] == pytest.approx(np.radians(1 / 60) ** 2, rel=1e-8)
    assert areas[1] == pytest.approx(np.pi * np.radians(0.5 / 60) ** 2, rel=1e-8)
    assert fp.depth_class.tolist() == [0, 1]
    assert fp.effective_area_sr() == pytest.approx(0.8 * areas[0] + areas[1], rel=1e-12)


@pytest.mark.parametrize("header,rows,words", [
    (["ra", "side"], [[1, 1]], ["'dec'", "columns are"]),
    (["ra", "dec", "side"], [[1, 2, 1], [2, 2, -1], [3, 2, 1]], ["side_a", "negative", "1"]),
    (["ra", "dec", "radius", "completeness"], [[1, 2, 1, 0.5], [2, 2, 1, 1.2]],
     ["completeness", "[0, 1]", "1"]),
    (["ra", "dec", "shape", "side"], [[1, 2, "hexagon", 1]], ["shape", "hexagon"]),
    (["ra", "dec", "shape", "side"], [[1, 2, "circle", 1]], ["radius"]),
])
def test_bad_field_tables_give_one_line_errors(tmp_path, header, rows, words):
    # common practice: say the file, the column and the rows, on one line
    path = _write_csv(tmp_path / "bad.csv", header, rows)
    with pytest.raises(InputError) as err:
        read_field_table(path)
    message = str(err.value)
    assert "\n" not in message and "bad.csv" in message
    for w in words:
        assert w in message


def test_missing_field_table_file(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        read_field_table(tmp_path / "nope.fits")
