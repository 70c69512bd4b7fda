package qr

import (
	"encoding/csv"
	"os"
	"strconv"
	"testing"

	"github.com/plumb-forecast/plumb/internal/sharedtest"
)

// engel reads the Engel food expenditure data (shared/data/reference/engel.csv,
// Koenker and Bassett 1978, as shipped by R's quantreg) and returns income
// and foodexp; the test skips when the open data is absent.
func engel(t testing.TB) (income, foodexp []float64) {
	t.Helper()
	path := sharedtest.Data(t, "reference/engel.csv")
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	recs, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if len(recs) < 2 || len(recs[0]) != 2 || recs[0][0] != "income" || recs[0][1] != "foodexp" {
		t.Fatalf("engel.csv: want header income,foodexp, got %v", recs[0])
	}
	for _, r := range recs[1:] {
		a, err := strconv.ParseFloat(r[0], 64)
		if err != nil {
			t.Fatal(err)
		}
		b, err := strconv.ParseFloat(r[1], 64)
		if err != nil {
			t.Fatal(err)
		}
		income = append(income, a)
		foodexp = append(foodexp, b)
	}
	if len(income) != 235 {
		t.Fatalf("engel.csv: want 235 households, got %d", len(income))
	}
	return income, foodexp
}

// design returns the row-major n x 2 design [1, x].
func design(x []float64) []float64 {
	out := make([]float64, 0, 2*len(x))
	for _, v := range x {
		out = append(out, 1, v)
	}
	return out
}
