/*
[candidate]
label   = "Centred hierarchy (deliberately ill-posed)"
about   = "Group means with a centred parameterisation and few observations per group"
support = "real"

[candidate.defaults]
obs_sd = 10.0   # known observation SD, large against the spread of the group means
*/
// Test fixture: the centred parameterisation of a hierarchical normal with weakly
// informed group means has a funnel-shaped posterior, which produces divergent
// transitions. Used to check the adapt_delta escalation, not as a real candidate.
data {
  int<lower=0> N;
  vector[N] y;
  int<lower=1> J;
  array[N] int<lower=1, upper=J> group;
  int<lower=0, upper=N> N_fit;
  array[N_fit] int<lower=1, upper=N> fit_idx;
  real<lower=0> obs_sd;
}
parameters {
  real mu;
  real<lower=0> tau;
  vector[J] theta;
}
model {
  mu ~ normal(0, 10);
  tau ~ cauchy(0, 5);
  theta ~ normal(mu, tau);
  y[fit_idx] ~ normal(theta[group[fit_idx]], obs_sd);
}
generated quantities {
  vector[N] log_lik;
  array[N] real y_rep = normal_rng(theta[group], obs_sd);
  for (n in 1:N) {
    log_lik[n] = normal_lpdf(y[n] | theta[group[n]], obs_sd);
  }
}
