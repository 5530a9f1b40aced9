/*
[candidate]
label   = "Raises when fitted"
about   = "Test fixture: the model block stops Stan with a fatal error once data enter the likelihood"
support = "real"
*/
data {
  int<lower=0> N;
  vector[N] y;
  int<lower=0, upper=N> N_fit;
  array[N_fit] int<lower=1, upper=N> fit_idx;
}
parameters {
  real mu;
}
model {
  mu ~ normal(0, 10);
  y[fit_idx] ~ normal(mu, 1);
  if (N_fit > 0) {
    fatal_error("deliberate failure inside the program");
  }
}
generated quantities {
  vector[N] log_lik;
  array[N] real y_rep = normal_rng(rep_vector(mu, N), 1);
  for (n in 1:N) {
    log_lik[n] = normal_lpdf(y[n] | mu, 1);
  }
}
