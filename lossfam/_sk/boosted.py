class LossfamBoostRegressor: pass
class LossfamBoostClassifier: pass
