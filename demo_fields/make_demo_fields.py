"""Regenerate the bundled demo fields: three invented galaxies with known truth.

    python demo_fields/make_demo_fields.py

Every galaxy here is synthetic (made by tiltedring.synthetic); names and positions are invented.
"""

from pathlib import Path

from tiltedring.synthetic import DiscTruth, make_field

HERE = Path(__file__).parent

GALAXIES = {
    "ashgrove": (
        DiscTruth(name="Ashgrove Disc", ra=152.3917, dec=-21.6042, x_center=63.3, y_center=64.1,
                  v_systemic=1450.0, position_angle=40.0, inclination=60.0, v_flat=180.0, r_turn=18.0,
                  disc_radius=120.0),
        dict(shape=(128, 128), pixel_scale=2.0, beam_fwhm=8.0, noise=3.0, seed=11),
    ),
    "brenmoor": (
        DiscTruth(name="Brenmoor Spiral", ra=38.7710, dec=44.1875, x_center=62.6, y_center=65.4,
                  v_systemic=2630.0, position_angle=250.0, inclination=48.0, v_flat=210.0, r_turn=14.0,
                  warp_radius=80.0, warp_twist=20.0, warp_tilt=8.0, disc_radius=124.0),
        dict(shape=(128, 128), pixel_scale=2.0, beam_fwhm=8.0, noise=4.0, seed=12, rotation=30.0,
             velocity_unit="m/s"),
    ),
    "calloway": (
        DiscTruth(name="Calloway Dwarf", ra=201.0458, dec=8.9310, x_center=47.8, y_center=46.2,
                  v_systemic=610.0, position_angle=125.0, inclination=40.0, v_flat=80.0, r_turn=30.0,
                  scale_length=25.0, disc_radius=85.0),
        dict(shape=(96, 96), pixel_scale=2.0, beam_fwhm=6.0, noise=4.0, seed=13),
    ),
}


def main():
    for stem, (truth, kwargs) in GALAXIES.items():
        field = make_field(truth, **kwargs)
        paths = field.write(HERE, stem)
        print(stem, {k: str(v.name) for k, v in paths.items()})


if __name__ == "__main__":
    main()
