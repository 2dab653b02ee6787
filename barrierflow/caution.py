"""The caution that every report of barrierflow carries (one text, used everywhere)."""

CAUTION = ("Research estimates only: not for clinical dosing or regulatory decisions without qualified "
           "review. Local regulations and licensed practice take precedence.")
