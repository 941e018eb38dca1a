package episode

import (
	"math"

	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"
)

// MeanCI95 is the sample mean and the half-width of its 95% confidence
// interval by Student's t with n-1 degrees of freedom (0 for n < 2).
func MeanCI95(xs []float64) (mean, half float64) {
	if len(xs) == 0 {
		return math.NaN(), math.NaN()
	}
	mean, sd := stat.MeanStdDev(xs, nil)
	if len(xs) < 2 {
		return mean, 0
	}
	t := distuv.StudentsT{Mu: 0, Sigma: 1, Nu: float64(len(xs) - 1)}.Quantile(0.975)
	return mean, t * sd / math.Sqrt(float64(len(xs)))
}

// RatioCI95 is mean(a)/mean(b) over paired samples with the half-width of
// its 95% interval by the delta method (the usual ratio-estimator
// variance: Var(a - R·b) / (n·mean(b)²); common practice).
func RatioCI95(a, b []float64) (ratio, half float64) {
	n := float64(len(a))
	if n == 0 {
		return math.NaN(), math.NaN()
	}
	ma, mb := stat.Mean(a, nil), stat.Mean(b, nil)
	ratio = ma / mb
	if n < 2 || mb == 0 {
		return ratio, math.NaN()
	}
	v := stat.Variance(a, nil) - 2*ratio*stat.Covariance(a, b, nil) + ratio*ratio*stat.Variance(b, nil)
	return ratio, 1.96 * math.Sqrt(max(v, 0)/n) / math.Abs(mb)
}
