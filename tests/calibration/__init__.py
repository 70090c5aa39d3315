"""Calibration and coverage studies of the shipped default, run through ``stratagap.analyze``.

* :mod:`calibration.scenarios` - the simulated datasets (every coefficient stated);
* :mod:`calibration.bands` - acceptance bands sized for the number of datasets, with their
  false-alarm rate and their power against a test of true size 7 %;
* :mod:`calibration.studies` - the studies: which scenario, which ``analyze`` options, which
  root seed, and the runner (one ``SeedSequence`` child per dataset);
* ``test_calibration_reduced.py`` - the reduced studies CI runs (marker ``slow``);
* ``run_studies.py`` - the full studies, on demand: ``python tests/calibration/run_studies.py --full``.
"""
