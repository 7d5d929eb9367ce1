def test_fixture(trained_small):
    t = trained_small.trained
    print(t.accuracy, t.seconds, t.epochs, t.history[-1])
