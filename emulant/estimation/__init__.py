"""The estimation stage, lowest module first: event codes and checks (:mod:`.events`); weighted
risk curves (:mod:`.survival`); Cox (:mod:`.cox`); pooled logistic hazards (:mod:`.pooled_logistic`);
weighting estimators of risk (:mod:`.tte_weighting`); one time-to-event outcome's rows (:mod:`.tte`);
the analysis sample (:mod:`.sample`); measured outcomes (:mod:`.measured`); E-values
(:mod:`.evalue`); the bootstrap, which takes the estimator as an argument (:mod:`.bootstrap`); and
the orchestration of all of it (:mod:`.effects`)."""
