"""The invented demo scenario (Hollowmere booster station, pump P2), installed with ganlet as
package data (ganlet.examples) so `ganlet demo` runs after any pip install."""
