/*
[candidate]
label   = "Student-t"
about   = "Symmetric outcome with heavier tails than the normal (robust to outliers)"
support = "real"

[candidate.defaults]
intercept_sd   = 2.0   # prior SD of the intercept, in units of y_scale, centred at y_center
coef_sd        = 1.0   # prior SD of each coefficient, in units of y_scale per predictor SD
group_sd_scale = 1.0   # half-normal scale of the SD of group intercepts and of group slopes (per predictor SD), in units of y_scale
sigma_scale    = 1.0   # half-normal scale of the t scale, in units of y_scale
nu_shape       = 2.0   # gamma(2, 0.1) prior on the degrees of freedom (Juarez & Steel 2010)
nu_rate        = 0.1
*/
// Student-t: y ~ student_t(nu, eta, sigma), identity link.
// Reference: SciPy t(df = nu, loc = eta, scale = sigma).
functions {
  vector linear_predictor(real intercept, matrix X, vector coef,
                          array[] int group, vector group_z, vector group_sd,
                          matrix Z, matrix slope_z, vector slope_sd, matrix group_corr_L) {
    vector[rows(X)] eta = intercept + X * coef;
    if (num_elements(group_sd) > 0) {
      if (num_elements(slope_sd) > 0) {
        // each group's intercept (row 1) and slopes (rows 2..), correlated, non-centred;
        // row 1 is group_sd[1] * group_z, since the first row of a Cholesky factor of a
        // correlation matrix is (1, 0, ..., 0)
        matrix[rows(group_corr_L), num_elements(group_z)] terms
          = diag_pre_multiply(append_row(group_sd, slope_sd), group_corr_L) * append_row(group_z', slope_z);
        eta += terms[1, group]' + rows_dot_product(Z, terms[2:rows(terms), group]');
      } else {
        eta += group_sd[1] * group_z[group];
      }
    }
    return eta;
  }
}
data {
  int<lower=0> N;
  vector[N] y;
  int<lower=0> K;
  matrix[N, K] X;
  int<lower=0> J;
  array[N] int<lower=0, upper=J> group;
  int<lower=0> Kz;                         // predictors (columns of X) with a slope per group
  matrix[N, Kz] Z;
  int<lower=0, upper=N> N_fit;
  array[N_fit] int<lower=1, upper=N> fit_idx;
  real y_center;
  real<lower=0> y_scale;
  real<lower=0> intercept_sd;
  real<lower=0> coef_sd;
  real<lower=0> group_sd_scale;
  real<lower=0> sigma_scale;
  real<lower=0> nu_shape;
  real<lower=0> nu_rate;
}
transformed data {
  int has_group = J > 0;
  int slopes = has_group * Kz;
}
parameters {
  real intercept;
  vector[K] coef;
  vector[J] group_z;                       // non-centred group intercepts
  vector<lower=0>[has_group] group_sd;
  matrix[slopes, J] slope_z;               // non-centred group slopes
  vector<lower=0>[slopes] slope_sd;
  cholesky_factor_corr[slopes > 0 ? slopes + 1 : 0] group_corr_L;
  real<lower=0> sigma;
  real<lower=1> nu;
}
model {
  // the linear predictor of the fitted observations only: with none fitted (the prior
  // predictive trial) the model block costs next to nothing
  vector[N_fit] eta = linear_predictor(intercept, X[fit_idx], coef, group[fit_idx], group_z, group_sd,
                                       Z[fit_idx], slope_z, slope_sd, group_corr_L);
  intercept ~ normal(y_center, intercept_sd * y_scale);
  coef ~ normal(0, coef_sd * y_scale);
  group_sd ~ normal(0, group_sd_scale * y_scale);
  slope_sd ~ normal(0, group_sd_scale * y_scale);
  sigma ~ normal(0, sigma_scale * y_scale);
  nu ~ gamma(nu_shape, nu_rate);
  group_z ~ std_normal();
  to_vector(slope_z) ~ std_normal();
  if (slopes > 0) {
    group_corr_L ~ lkj_corr_cholesky(2);   // mild pull towards no correlation
  }
  y[fit_idx] ~ student_t(nu, eta, sigma);
}
generated quantities {
  vector[N] log_lik;
  array[N] real y_rep;
  real lprior = normal_lpdf(intercept | y_center, intercept_sd * y_scale)
                + normal_lpdf(coef | 0, coef_sd * y_scale)
                + normal_lpdf(group_sd | 0, group_sd_scale * y_scale)
                + normal_lpdf(slope_sd | 0, group_sd_scale * y_scale)
                + (slopes > 0 ? lkj_corr_cholesky_lpdf(group_corr_L | 2) : 0)
                + normal_lpdf(sigma | 0, sigma_scale * y_scale)
                + gamma_lpdf(nu | nu_shape, nu_rate);
  {
    vector[N] eta = linear_predictor(intercept, X, coef, group, group_z, group_sd,
                                     Z, slope_z, slope_sd, group_corr_L);
    for (n in 1:N) {
      log_lik[n] = student_t_lpdf(y[n] | nu, eta[n], sigma);
    }
    y_rep = student_t_rng(nu, eta, sigma);
  }
}
