"""Board profiles: TOML data (one file per board). This file only makes the folder install as
package data (ganlet.boards), so `ganlet compile` finds the profiles after any pip install."""
