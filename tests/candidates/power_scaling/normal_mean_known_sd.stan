/*
[candidate]
label   = "Normal mean, known SD, with lprior"
about   = "Conjugate normal model with a known observation SD and its log prior (test fixture)"
support = "real"

[candidate.defaults]
prior_mean = 0.0
prior_sd   = 2.0
known_sd   = 1.0
*/
// Test fixture for power-scaling: mu ~ normal(prior_mean, prior_sd),
// y ~ normal(mu, known_sd); the posterior of mu, and of mu under a power-scaled
// prior, are normal with closed-form mean and SD.
data {
  int<lower=0> N;
  vector[N] y;
  int<lower=0, upper=N> N_fit;
  array[N_fit] int<lower=1, upper=N> fit_idx;
  real prior_mean;
  real<lower=0> prior_sd;
  real<lower=0> known_sd;
}
parameters {
  real mu;
}
model {
  mu ~ normal(prior_mean, prior_sd);
  y[fit_idx] ~ normal(mu, known_sd);
}
generated quantities {
  vector[N] log_lik;
  array[N] real y_rep = normal_rng(rep_vector(mu, N), known_sd);
  real lprior = normal_lpdf(mu | prior_mean, prior_sd);
  for (n in 1:N) {
    log_lik[n] = normal_lpdf(y[n] | mu, known_sd);
  }
}
