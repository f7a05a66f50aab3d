"""The invented company: its sites, engine families, kinds of machine and planted units.

Everything here is invented for the demo: the company, the sites, the family names, the
fleet numbers and the technicians. Levels and limits are plausible service-data-like
numbers (domain.md §3.2 ranges), not any maker's data.
"""

from __future__ import annotations

from dataclasses import dataclass

from fleetdb import units as fleet_units

COMPANY = "Quellmoor Yard & Haulage"


@dataclass(frozen=True)
class Site:
    """A depot: its elevation and the units its technicians type."""

    name: str
    elevation_m: float
    pressure_unit: str  # unit typed for compression on spark-ignition engines
    diesel_pressure_unit: str  # unit typed for compression on diesels (diesel gauge)
    technicians: tuple[str, ...]


@dataclass(frozen=True)
class Family:
    """An engine family with its demo service data."""

    name: str
    fuel: str
    cylinders: int
    banks: str
    compression_ratio: float
    min_compression: float  # in ``compression_units``, sea-level equivalent
    compression_units: str
    min_ratio: float
    standard_psi: float  # healthy new level at sea level
    wear_psi_per_hour: float  # family mean loss of compression per engine hour
    crank_rpm_nominal: float  # cranking speed with a good battery

    @property
    def spark_ignition(self) -> bool:
        """Whether the engine has a throttle and meaningful manifold vacuum."""
        return self.fuel != "diesel"

    @property
    def min_kpa(self) -> float:
        """The minimum, gauge kPa at sea level."""
        return fleet_units.to_kpa(self.min_compression, self.compression_units)

    @property
    def standard_kpa(self) -> float:
        """The healthy new level, gauge kPa at sea level."""
        return fleet_units.to_kpa(self.standard_psi, "psi")


SITES: dict[str, Site] = {s.name: s for s in (
    Site("Saltgrass Quay", 6.0, "psi", "psi", ("Ines", "Ravi", "T.O.")),
    Site("Ferncliff Depot", 1010.0, "kPa", "kPa", ("Marit", "Jonah", "A.K.")),
    Site("Kettlerock Yard", 1705.0, "psi", "bar", ("Sela", "Bram", "P.D.")),
)}
SALTGRASS, FERNCLIFF, KETTLEROCK = SITES

FAMILIES: dict[str, Family] = {f.name: f for f in (
    # LPG inline four of lift trucks and sweepers.
    Family("Fennick 4L", "lpg", 4, "1-2-3-4", 9.2, 120, "psi", 0.75, 165, 0.0025, 250),
    # Gasoline V6, odd cylinders on the left bank.
    Family("Tavrin 6V", "gasoline", 6, "1-3-5/2-4-6", 9.4, 125, "psi", 0.75, 170, 0.0035, 250),
    # Diesel inline six of yard tractors and generator sets; limit typed in kPa.
    Family("Orsel 6D", "diesel", 6, "1-2-3-4-5-6", 17.0, 2070, "kPa", 0.80, 430, 0.0050, 230),
    # CNG inline six of generator sets.
    Family("Quillan 6G", "cng", 6, "1-2-3-4-5-6", 10.5, 140, "psi", 0.75, 185, 0.0022, 250),
)}
FENNICK, TAVRIN, ORSEL, QUILLAN = FAMILIES

#: Fleet-number prefix -> kind of machine, usual hours per week, test interval (days).
KINDS: dict[str, tuple[str, tuple[float, float], int]] = {
    "LT": ("lift truck", (25.0, 55.0), 182),
    "YT": ("yard tractor", (40.0, 70.0), 182),
    "SW": ("sweeper", (15.0, 30.0), 182),
    "LV": ("light truck", (10.0, 25.0), 182),
    "GS": ("generator set", (2.0, 8.0), 182),
}

#: Background (plainly sound) units: site, prefix, family, how many.
BACKGROUND: tuple[tuple[str, str, str, int], ...] = (
    (SALTGRASS, "LT", FENNICK, 8),
    (SALTGRASS, "YT", ORSEL, 4),
    (SALTGRASS, "LV", TAVRIN, 3),
    (SALTGRASS, "SW", TAVRIN, 2),
    (SALTGRASS, "GS", QUILLAN, 2),
    (FERNCLIFF, "LT", FENNICK, 6),
    (FERNCLIFF, "YT", ORSEL, 3),
    (FERNCLIFF, "LV", TAVRIN, 2),
    (FERNCLIFF, "SW", FENNICK, 1),
    (FERNCLIFF, "GS", ORSEL, 1),
    (KETTLEROCK, "LT", FENNICK, 5),
    (KETTLEROCK, "YT", ORSEL, 2),
    (KETTLEROCK, "LV", TAVRIN, 2),
    (KETTLEROCK, "SW", TAVRIN, 1),
    (KETTLEROCK, "GS", QUILLAN, 1),
)


@dataclass(frozen=True)
class PlantedUnit:
    """A unit whose history tells one story (see README.md)."""

    fleet_no: str
    story: str
    site: str
    family: str
    hours_per_week: float
    age_days: int  # in service this many days before as_of
    last_offset_days: int  # latest test this many days before as_of
    interval_days: int
    target_psi: float  # mean sea-level level (new-engine basis) at the latest test


PLANTED: tuple[PlantedUnit, ...] = (
    PlantedUnit("GS-901", "1", SALTGRASS, QUILLAN, 168.0, 730, 4, 91, 148.5),
    PlantedUnit("LT-902", "2", SALTGRASS, FENNICK, 40.0, 1800, 5, 182, 141.0),
    PlantedUnit("LV-903", "3a", SALTGRASS, TAVRIN, 20.0, 2900, 12, 182, 142.0),
    PlantedUnit("LV-933", "3b", SALTGRASS, TAVRIN, 22.0, 2700, 16, 182, 142.0),
    PlantedUnit("SW-904", "4", FERNCLIFF, TAVRIN, 22.0, 2200, 33, 182, 146.0),
    PlantedUnit("LT-905", "5a", SALTGRASS, FENNICK, 38.0, 1500, 9, 182, 145.0),
    PlantedUnit("LT-955", "5b", FERNCLIFF, FENNICK, 35.0, 1700, 21, 182, 146.0),
    PlantedUnit("LT-906", "6", FERNCLIFF, FENNICK, 45.0, 3300, 25, 182, 160.0),
    PlantedUnit("YT-907", "7", FERNCLIFF, ORSEL, 50.0, 1900, 18, 182, 365.0),
    PlantedUnit("SW-908", "8", KETTLEROCK, FENNICK, 12.0, 2600, 735, 121, 157.0),
    PlantedUnit("LT-909", "9", KETTLEROCK, FENNICK, 30.0, 2260, 14, 182, 141.0),
)
#: Story 6: the engine's level (sea-level psi) when it was overhauled.
WORN_BEFORE_OVERHAUL_PSI = 123.0
