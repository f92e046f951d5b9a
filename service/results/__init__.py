"""Results of stored nights: scorings, comparisons with the reference and exports.

:mod:`.scoring` scores a night with a rule or a model version; :mod:`.reports` holds the comparisons
and the parameter export.
"""

