// Package fitjob estimates each skill's BKT parameters from answer
// histories by Expectation-Maximisation, scores how well a parameter set
// predicts next answers, simulates cohorts with known parameters, and
// decides which fitted sets may replace the ones in force.
package fitjob
