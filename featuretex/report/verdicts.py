"""What each verdict means to the person reading a report, in our words, and its colour."""

from __future__ import annotations

# verdict -> (headline, what to do, colour); also used by the batch index
VERDICTS: dict[str, tuple[str, str, str]] = {
    "rescan": ("Rescan needed",
               "Part of the object was not photographed well enough for any texture to be right there. "
               "Plan another capture of the areas named below.", "#b3261e"),
    "fix-geometry": ("Fix the geometry first",
                     "The photos disagree with the mesh in places, and no texture can hide that. Repair "
                     "the marked areas of the mesh, then run again.", "#b8620a"),
    "refine-texture": ("Refine the texture",
                       "The mesh holds up; the texture is still under-fitted. A longer fit or a larger "
                       "texture should improve it.", "#1f5fa8"),
    "ready": ("Ready to deliver",
              "The textured model matches the photos it was not fitted to; nothing stands out.", "#2e7d32"),
}
NO_VERDICT = ("No verdict yet",
              "The diagnosis did not run for this scan, so there is no verdict. Everything that was "
              "produced is shown below.", "#5f6b73")
FAILED = ("Failed", "The run stopped with an error before it finished.", "#6b2a5e")

# batch order: the scans that need the most work first
ORDER = ("rescan", "failed", "fix-geometry", "refine-texture", "", "ready")


def describe(verdict: str | None) -> tuple[str, str, str]:
    if verdict == "failed":
        return FAILED
    return VERDICTS.get(verdict or "", NO_VERDICT)


def rank(verdict: str | None) -> int:
    v = verdict if verdict in ORDER else ""
    return ORDER.index(v)
