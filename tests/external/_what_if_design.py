"""The NHEFS exposure-model design of Hernan & Robins, What If (2020), sec. 12.2 (from memory):
sex, race, age, education, smoking intensity, smoking years, exercise, activity and 1971 weight,
with squares of the continuous ones. Shared by the NHEFS reference tests."""

import pandas as pd


def what_if_covariates(d: pd.DataFrame) -> pd.DataFrame:
    """The covariate columns (no constant) of the What If exposure model, for the rows of ``d``."""
    num = pd.DataFrame({
        "sex": d["sex"].cat.codes, "race": d["race"].cat.codes,
        "age": d["age"], "age2": d["age"] ** 2,
        "smokeintensity": d["smokeintensity"], "smokeintensity2": d["smokeintensity"] ** 2,
        "smokeyrs": d["smokeyrs"], "smokeyrs2": d["smokeyrs"] ** 2,
        "wt71": d["wt71"], "wt712": d["wt71"] ** 2}).astype(float)
    dummies = pd.get_dummies(d[["education", "exercise", "active"]].astype(str),
                             drop_first=True).astype(float)
    return pd.concat([num, dummies], axis=1)
