"""The models stage: design matrices (:mod:`.design`), the propensity model (:mod:`.propensity`),
weights per estimand (:mod:`.weights`), balance (:mod:`.balance`) and positivity (:mod:`.positivity`)."""
