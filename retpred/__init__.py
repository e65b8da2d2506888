"""retpred: reversed-phase retention prediction for HPLC/UHPLC method development.

Data path: SMILES + method -> standardised molecules (``structures``) -> descriptors and
ionisation (``chemistry``) -> retention parameters (``model``, with the column term from
``column``) -> gradient engine (``gradient``) -> peaks and pairs (``peaks``) -> report.
"""

__version__ = "0.1.0"
