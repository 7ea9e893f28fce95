"""Quality: lead faults and beat scores (scores), window indices and grades (windows), reason
codes, flags and their groups (reasons). Noise is judged here from the signal; rhythm is
reported apart and never excludes."""
