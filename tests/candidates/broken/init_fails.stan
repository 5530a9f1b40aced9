/*
[candidate]
label   = "Cannot start"
about   = "Test fixture: the log density is not finite anywhere, so initialisation fails"
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
  real<lower=0, upper=1> p;
}
model {
  target += log(p - 2);   // log of a negative number: never finite
  y[fit_idx] ~ normal(mu, 1);
}
generated quantities {
  vector[N] log_lik;
  array[N] real y_rep = normal_rng(rep_vector(mu, N), 1);
  for (n in 1:N) {
    log_lik[n] = normal_lpdf(y[n] | mu, 1);
  }
}
